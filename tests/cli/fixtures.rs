//! Tiny data and spec fixtures (invented), written into each test's folder.

use crate::util::Dir;

/// 40 rows: two numeric features, one categorical, a key, a group, an order, a target with a
/// known relation plus a small deterministic wobble.
pub fn small_csv() -> String {
    let mut s = String::from("id,x1,x2,shade,bay,week,y\n");
    for i in 0..40 {
        let x1 = i as f64 * 0.5;
        let x2 = ((i * 7) % 11) as f64;
        let shade = ["low", "mid", "high"][i % 3];
        let wobble = ((i * 13) % 5) as f64 * 0.1;
        let y = 2.0 * x1 - 0.5 * x2 + if shade == "high" { 1.0 } else { 0.0 } + wobble;
        s.push_str(&format!(
            "r{i},{x1},{x2},{shade},B{},{},{y}\n",
            i % 8,
            i / 4
        ));
    }
    s
}

pub const SMALL_SPEC: &str = r#"name = "small"
task = "regression"

[data]
path = "small.csv"
target = "y"
key = "id"
ignore = ["bay", "week"]

[split]
method = "random"
seed = 5
test = 0.25
folds = 4

[[model]]
kind = "ridge"
lambda = [0.1, 1, 10]

[[model]]
kind = "knn"
k = [1, 3]
"#;

/// A folder with small.csv and small.toml.
pub fn small_dir(name: &str) -> Dir {
    let d = Dir::new(name);
    d.write("small.csv", &small_csv());
    d.write("small.toml", SMALL_SPEC);
    d
}

/// Store a run of `spec_file` (in `d`, on its data) into the ledger at `ledger` with the library,
/// its partition's rows identified as `identity` says: a ledger as an earlier release made it.
/// Returns the partition's id.
pub fn library_run(
    d: &Dir,
    spec_file: &str,
    ledger: &std::path::Path,
    identity: probity::data::Identity,
) -> String {
    let spec_path = d.path.join(spec_file);
    let spec = probity::spec::load(&spec_path).unwrap();
    let data = d.path.join(&spec.data.path);
    let table = probity::data::load(&data, &[], 2).unwrap();
    let mut out = probity::runner::run(&spec, &table, 2).unwrap();
    out.prepared.identity = identity;
    out.prepared.ids = out.prepared.identities(&table, 2);
    if let Some(dir) = ledger.parent() {
        std::fs::create_dir_all(dir).unwrap();
    }
    let mut l = probity::ledger::Ledger::open(ledger, true).unwrap();
    let meta = probity::ledger::RunMeta {
        started_at: "2026-12-01T00:00:00Z".into(),
        finished_at: "2026-12-01T00:00:01Z".into(),
        tool_version: "0.1.0".into(),
        user: "u".into(),
        host: "h".into(),
        threads: 2,
        spec_path: spec_path.display().to_string(),
        data_path: data.display().to_string(),
        note: None,
        tool_commit: "c".into(),
        target_triple: "t".into(),
        replay: None,
        start: None,
    };
    l.write_run(&spec, &table, &out, &meta).unwrap();
    drop(l);
    // Before schema 11 a partition's seal was no entry of its own: the chain is linked again
    // without it, as that release linked it.
    let c = rusqlite::Connection::open(ledger).unwrap();
    c.execute_batch("DELETE FROM chain; DELETE FROM seals;")
        .unwrap();
    probity::ledger::chain::adopt(&c).unwrap();
    out.prepared.partition_id
}
