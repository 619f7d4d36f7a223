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
