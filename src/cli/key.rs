//! `probity key new|show|trust|list`: a person's signing key (a file outside every ledger) and
//! the public keys a ledger trusts to sign the bundles it merges.

use super::{Global, open_for_write, open_reading, out, out_json};
use crate::error::{Error, Result};
use crate::signing::Key;
use std::path::PathBuf;

/// Signing keys: make yours, show its public half, trust a teammate's
#[derive(clap::Args, Debug)]
pub struct Args {
    #[command(subcommand)]
    pub what: What,
}

#[derive(clap::Subcommand, Debug)]
pub enum What {
    /// Make your signing key (a private file outside the ledger) and print its public key
    New {
        /// The name others will know the key by (for example your name or initials)
        #[arg(long)]
        name: String,
        #[command(flatten)]
        key: KeyPath,
    },
    /// Print your key's name and public key (for teammates to trust)
    Show {
        #[command(flatten)]
        key: KeyPath,
        /// Print JSON instead of text
        #[arg(long)]
        json: bool,
    },
    /// Trust a public key to sign bundles merged into this ledger, under a name
    Trust {
        /// The name to know the key by
        name: String,
        /// The public key: 64 hex digits, as `probity key show` prints it
        public_key: String,
    },
    /// List the keys this ledger trusts
    List {
        /// Print JSON instead of a table
        #[arg(long)]
        json: bool,
    },
}

/// Where the signing key is kept.
#[derive(clap::Args, Debug, Clone)]
pub struct KeyPath {
    /// The signing key file [default: $XDG_CONFIG_HOME/probity/signing-key.json, or
    /// ~/.config/probity/signing-key.json]
    #[arg(long = "key", env = "PROBITY_KEY", value_name = "FILE")]
    pub path: Option<PathBuf>,
}

impl KeyPath {
    /// The key file: as given, or in the user's configuration folder.
    pub fn resolve(&self) -> Result<PathBuf> {
        if let Some(p) = &self.path {
            return Ok(p.clone());
        }
        let config = std::env::var_os("XDG_CONFIG_HOME")
            .filter(|v| !v.is_empty())
            .map(PathBuf::from)
            .or_else(|| std::env::var_os("HOME").map(|h| PathBuf::from(h).join(".config")))
            .ok_or_else(|| {
                Error::Input(
                    "no configuration folder (neither XDG_CONFIG_HOME nor HOME is set); pass --key FILE".into(),
                )
            })?;
        Ok(config.join("probity").join("signing-key.json"))
    }
}

pub fn run(g: &Global, a: Args) -> Result<i32> {
    match a.what {
        What::New { name, key } => {
            if let Some(why) = crate::signing::name_problem(&name) {
                return Err(Error::Input(format!(
                    "--name {name:?} {why}; choose a name of printable characters"
                )));
            }
            let path = key.resolve()?;
            let k = Key::generate(&name)?;
            k.save(&path)?;
            eprintln!(
                "wrote a signing key for {name:?} to {} (readable by you only; keep it, and keep it private)",
                path.display()
            );
            out(&format!("{} {}\n", k.name, k.public_hex()))?;
        }
        What::Show { key, json } => {
            let k = Key::load(&key.resolve()?)?;
            if json {
                out_json(&serde_json::json!({"name": k.name, "public_key": k.public_hex()}))?;
            } else {
                out(&format!("{} {}\n", k.name, k.public_hex()))?;
            }
        }
        What::Trust { name, public_key } => {
            let mut ledger = open_for_write(g)?;
            let who = super::reveal::who();
            ledger.trust(
                &public_key,
                &name,
                &who.at,
                &format!("{}@{}", who.user, who.host),
            )?;
            eprintln!(
                "trusted key {} as {name:?} in {}",
                public_key.to_ascii_lowercase(),
                ledger.path().display()
            );
        }
        What::List { json } => {
            let ledger = open_reading(g)?;
            let keys = ledger.trusted_keys()?;
            if json {
                let v: Vec<serde_json::Value> = keys
                    .iter()
                    .map(|(k, n, at, by)| {
                        serde_json::json!({"name": n, "public_key": k, "added_at": at, "added_by": by})
                    })
                    .collect();
                out_json(&serde_json::json!({"trusted_keys": v}))?;
            } else {
                out(&crate::report::table::trusted_keys(&keys))?;
            }
        }
    }
    Ok(0)
}
