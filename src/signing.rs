//! Signing keys and bundle signatures (Ed25519, by the `ed25519-dalek` crate; no cryptography
//! of our own). A person's key lives in a file outside every ledger, readable by its owner
//! only; `pack` signs a bundle's summary with it, and `merge` checks the signature against the
//! public keys a ledger trusts.
//!
//! What is signed is `signed_message`: the bundle's format and creation time, the signer's name
//! and public key, every entry's kind and chain hashes (each entry hash covers that entry's
//! content, which `merge` recomputes), and for each partition the bundle ships, the counts of
//! its reveals and development uses in the sender's ledger.

use crate::error::{Error, Result};
use ed25519_dalek::{Signature, Signer, SigningKey, VerifyingKey};
use serde_json::{Value, json};
use std::path::Path;

/// The text that opens a key file.
const KEY_FORMAT: &str = "probity-signing-key-1";

/// A person's signing key: a name for others to know it by, and the 32-byte Ed25519 secret.
pub struct Key {
    pub name: String,
    secret: SigningKey,
}

impl Key {
    /// A new key from the operating system's random source.
    pub fn generate(name: &str) -> Result<Key> {
        let mut seed = [0u8; 32];
        getrandom::fill(&mut seed)
            .map_err(|e| Error::Internal(format!("no randomness for a key: {e}")))?;
        Ok(Key {
            name: name.to_string(),
            secret: SigningKey::from_bytes(&seed),
        })
    }

    /// The public key, as 64 lowercase hex digits.
    pub fn public_hex(&self) -> String {
        crate::spec::hex(self.secret.verifying_key().as_bytes())
    }

    /// The signature of `message`, as 128 hex digits.
    pub fn sign(&self, message: &[u8]) -> String {
        crate::spec::hex(&self.secret.sign(message).to_bytes())
    }

    /// Write the key to `path`, readable and writable by its owner only, refusing to replace
    /// an existing file (a lost key cannot sign for its owner again).
    pub fn save(&self, path: &Path) -> Result<()> {
        let io = |e| Error::Io {
            action: "cannot write signing key",
            path: path.to_path_buf(),
            source: e,
        };
        if let Some(dir) = path.parent() {
            std::fs::create_dir_all(dir).map_err(io)?;
        }
        let text = json!({
            "format": KEY_FORMAT,
            "name": self.name,
            "public": self.public_hex(),
            "secret": crate::spec::hex(self.secret.as_bytes()),
        });
        let mut opts = std::fs::OpenOptions::new();
        opts.write(true).create_new(true);
        #[cfg(unix)]
        std::os::unix::fs::OpenOptionsExt::mode(&mut opts, 0o600);
        let mut f = opts.open(path).map_err(|e| {
            if e.kind() == std::io::ErrorKind::AlreadyExists {
                Error::Input(format!(
                    "{} already holds a signing key; keep it (`probity key show` prints its public key), or pass --key with a new path",
                    path.display()
                ))
            } else {
                io(e)
            }
        })?;
        std::io::Write::write_all(&mut f, format!("{text:#}\n").as_bytes()).map_err(io)
    }

    /// Read a key file; refused (exit 2) when it is missing, malformed, or readable by others.
    pub fn load(path: &Path) -> Result<Key> {
        let bad = |why: &str| {
            Error::Input(format!(
                "{}: {why}; make a key with `probity key new`",
                path.display()
            ))
        };
        let text = std::fs::read_to_string(path).map_err(|e| match e.kind() {
            std::io::ErrorKind::NotFound => bad("no signing key here"),
            _ => Error::Io {
                action: "cannot read signing key",
                path: path.to_path_buf(),
                source: e,
            },
        })?;
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = std::fs::metadata(path).map_or(0, |m| m.permissions().mode());
            if mode & 0o077 != 0 {
                return Err(Error::Input(format!(
                    "{}: the signing key is readable by others (mode {:o}); `chmod 600` it, and make a new key if others may have read it",
                    path.display(),
                    mode & 0o777
                )));
            }
        }
        let v: Value = serde_json::from_str(&text).map_err(|_| bad("not a probity key file"))?;
        if v["format"] != KEY_FORMAT {
            return Err(bad("not a probity key file"));
        }
        let name = v["name"]
            .as_str()
            .ok_or_else(|| bad("the key has no name"))?;
        if let Some(why) = name_problem(name) {
            return Err(bad(&format!("the key's name {name:?} {why}")));
        }
        let seed: [u8; 32] = v["secret"]
            .as_str()
            .and_then(unhex)
            .and_then(|b| b.try_into().ok())
            .ok_or_else(|| bad("the key's secret is not 64 hex digits"))?;
        Ok(Key {
            name: name.to_string(),
            secret: SigningKey::from_bytes(&seed),
        })
    }
}

/// Why `name` cannot name a key, or `None`: a name is printed on terminals (by `merge`,
/// `audit`, `key list`), so it must be printable: not empty, and without control characters
/// (which can carry terminal escape codes) or the invisible controls of bidirectional text
/// (which can make a name read as another).
pub fn name_problem(name: &str) -> Option<&'static str> {
    if name.trim().is_empty() {
        return Some("is empty");
    }
    name.chars()
        .any(unprintable)
        .then_some("holds control characters")
}

/// A control character, or an invisible control of bidirectional text.
pub fn unprintable(c: char) -> bool {
    c.is_control()
        || matches!(c, '\u{200e}' | '\u{200f}' | '\u{061c}' | '\u{202a}'..='\u{202e}' | '\u{2066}'..='\u{2069}')
}

/// Bytes from hex digits (either case); `None` for anything else.
pub fn unhex(h: &str) -> Option<Vec<u8>> {
    if !h.len().is_multiple_of(2) {
        return None;
    }
    (0..h.len())
        .step_by(2)
        .map(|i| u8::from_str_radix(h.get(i..i + 2)?, 16).ok())
        .collect()
}

/// A public key as written (64 hex digits), checked to be a point of the curve.
pub fn public_key(hex: &str) -> std::result::Result<String, String> {
    let bytes: [u8; 32] = unhex(hex)
        .and_then(|b| b.try_into().ok())
        .ok_or_else(|| format!("{hex:?} is not a public key (64 hex digits)"))?;
    VerifyingKey::from_bytes(&bytes).map_err(|_| format!("{hex} is not an Ed25519 public key"))?;
    Ok(hex.to_ascii_lowercase())
}

/// Whether `signature` (128 hex digits) is `public`'s signature of `message`, checked strictly
/// (`verify_strict`: no small-order keys, no malleable signatures).
pub fn verify(public: &str, message: &[u8], signature: &str) -> std::result::Result<(), String> {
    let key: [u8; 32] = unhex(public)
        .and_then(|b| b.try_into().ok())
        .ok_or("the signer's public key is not 64 hex digits")?;
    let key = VerifyingKey::from_bytes(&key).map_err(|_| "the signer's key is not a key")?;
    let sig: [u8; 64] = unhex(signature)
        .and_then(|b| b.try_into().ok())
        .ok_or("the signature is not 128 hex digits")?;
    key.verify_strict(message, &Signature::from_bytes(&sig))
        .map_err(|_| "the signature does not match the bundle".to_string())
}

/// The bytes a bundle's signature covers, one line each, every text written as a JSON string
/// (so no value can pass for a line break): the format, the creation time, the signer's name
/// and key, each entry's kind, previous hash, own hash and run, and each partition's counts.
/// `None` when the bundle lacks a part.
pub fn signed_message(bundle: &Value, signer: &str, public: &str) -> Option<Vec<u8>> {
    let s = |v: &Value| v.as_str().map(|t| Value::String(t.to_string()).to_string());
    let mut out = String::from("probity-bundle-signature-1\n");
    out += &format!("format {}\n", s(&bundle["format"])?);
    out += &format!("created_at {}\n", s(&bundle["created_at"])?);
    out += &format!("signer {} {}\n", json!(signer), json!(public));
    for e in bundle["entries"].as_array()? {
        let run = match &e["run_entry"] {
            Value::Null => "null".to_string(),
            v => s(v)?,
        };
        out += &format!(
            "entry {} {} {} {run}\n",
            s(&e["kind"])?,
            s(&e["prev_hash"])?,
            s(&e["entry_hash"])?
        );
    }
    for p in bundle["partitions"].as_array()? {
        out += &format!(
            "partition {} reveals {} uses {}\n",
            s(&p["id"])?,
            p["reveals"].as_u64()?,
            p["uses"].as_u64()?
        );
    }
    Some(out.into_bytes())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// RFC 8032, section 7.1, TESTs 1-3 (https://www.rfc-editor.org/rfc/rfc8032#section-7.1):
    /// secret key, public key, message, signature. Ed25519 signatures are deterministic, so the
    /// crate must give these exact bytes, and verify them.
    const RFC8032: [(&str, &str, &str, &str); 3] = [
        (
            "9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60",
            "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a",
            "",
            "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b",
        ),
        (
            "4ccd089b28ff96da9db6c346ec114e0f5b8a319f35aba624da8cf6ed4fb8a6fb",
            "3d4017c3e843895a92b70aa74d1b7ebc9c982ccf2ec4968cc0cd55f12af4660c",
            "72",
            "92a009a9f0d4cab8720e820b5f642540a2b27b5416503f8fb3762223ebdb69da085ac1e43e15996e458f3613d0f11d8c387b2eaeb4302aeeb00d291612bb0c00",
        ),
        (
            "c5aa8df43f9f837bedb7442f31dcb7b166d38535076f094b85ce3a2e0b4458f7",
            "fc51cd8e6218a1a38da47ed00230f0580816ed13ba3303ac5deb911548908025",
            "af82",
            "6291d657deec24024827e69c3abe01a30ce548a284743a445e3680d7db5ac3ac18ff9b538d16f290ae67f760984dc6594a7c15e9716ed28dc027beceea1ec40a",
        ),
    ];

    #[test]
    fn rfc_8032_test_vectors() {
        for (secret, public, message, signature) in RFC8032 {
            let key = Key {
                name: "rfc".into(),
                secret: SigningKey::from_bytes(&unhex(secret).unwrap().try_into().unwrap()),
            };
            let msg = unhex(message).unwrap();
            assert_eq!(key.public_hex(), public);
            assert_eq!(key.sign(&msg), signature);
            assert_eq!(verify(public, &msg, signature), Ok(()));
            // One bit changed in the message, or in the signature, and it no longer verifies.
            let mut other = msg.clone();
            other.push(0);
            assert!(verify(public, &other, signature).is_err());
            let mut bad = unhex(signature).unwrap();
            bad[0] ^= 1;
            assert!(verify(public, &msg, &crate::spec::hex(&bad)).is_err());
        }
    }

    #[test]
    fn keys_are_saved_private_and_read_back() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("k").join("key.json");
        let key = Key::generate("alice").unwrap();
        key.save(&path).unwrap();
        let back = Key::load(&path).unwrap();
        assert_eq!(
            (back.name.as_str(), back.public_hex()),
            ("alice", key.public_hex())
        );
        assert!(
            key.save(&path).is_err(),
            "an existing key is never replaced"
        );
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = std::fs::metadata(&path).unwrap().permissions().mode();
            assert_eq!(mode & 0o777, 0o600);
            std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o644)).unwrap();
            assert!(
                Key::load(&path).is_err(),
                "a key others can read is refused"
            );
        }
    }

    #[test]
    fn names_must_be_printable() {
        for good in ["ada", "Ada Lovelace", "José", "李"] {
            assert_eq!(name_problem(good), None, "{good:?}");
        }
        for bad in [
            "",
            "  ",
            "a\u{1b}[2Jb",
            "a\nb",
            "a\u{7f}",
            "a\u{9b}b",
            "a\u{202e}b",
        ] {
            assert!(name_problem(bad).is_some(), "{bad:?}");
        }
    }

    #[test]
    fn a_text_cannot_pass_for_another_line_of_the_message() {
        let b = json!({"format": "f", "created_at": "t\nentry x", "entries": [], "partitions": []});
        let m = String::from_utf8(signed_message(&b, "a", "00").unwrap()).unwrap();
        assert_eq!(m.lines().count(), 4, "{m}");
    }
}
