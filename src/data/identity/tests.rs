//! Tests of row identity version 3: pinned digests, the canonical number form worked by hand,
//! invariance under the edits it is meant to ignore, and equal bytes at any thread count.

use super::*;
use crate::data::{MISSING_CODE, parse};
use std::path::{Path, PathBuf};

fn hexed(k: &RowKey) -> String {
    crate::spec::hex(k)
}

fn p(text: &str, text_columns: &[&str]) -> Table {
    parse(
        text.as_bytes(),
        Path::new("t.csv"),
        String::new(),
        text_columns,
    )
    .unwrap()
}

fn all(t: &Table) -> Vec<usize> {
    (0..t.n_rows()).collect()
}

fn numeric(name: &str, v: &[f64]) -> Column {
    Column {
        name: name.into(),
        values: Values::Numeric(v.to_vec()),
    }
}

fn text(name: &str, levels: &[&str], codes: &[u32]) -> Column {
    Column {
        name: name.into(),
        values: Values::Text {
            codes: codes.to_vec(),
            levels: levels.iter().map(|l| l.to_string()).collect(),
        },
    }
}

fn table(columns: Vec<Column>) -> Table {
    let n = match &columns[0].values {
        Values::Numeric(v) => v.len(),
        Values::Text { codes, .. } => codes.len(),
    };
    Table {
        path: PathBuf::from("t.csv"),
        sha256: String::new(),
        columns,
        lines: (2..n as u64 + 2).collect(),
    }
}

fn decimal(m: i64, d: i16) -> NumberCell {
    NumberCell::Decimal { m, d }
}

/// Each value worked by hand from the definition (exact decimal values of the doubles from
/// Python 3.11 `decimal`, 80 digits):
/// - 12.87 is 12.86999999999999921...; P(1) = 10 <= it < 100 = P(2), so d = 1, k = 8;
///   the exact product with 1e8 is 1286999999.99999992..., which rounds to the double
///   1287000000; + 0.5 floored: m = 1287000000.
/// - 12.87 + 1e-12 = 12.870000000000999...: v = 1287000000.0001, m = 1287000000 (the same).
/// - 12.88: v = 1288000000 exactly after rounding, m = 1288000000.
/// - 2/3 = 0.66666666666666662...: d = -1, k = 10, v = 6666666666.666666, v + 0.5 =
///   6666666667.166666, m = 6666666667.
/// - -0.5: d = -1, k = 10, v = 5e9, m = -5000000000.
/// - 0.1: the double is P(-1) itself, so d = -1; v = 0.1 * 1e10 rounds to 1e9.
/// - 123456789012: d = 11, k = -2, v = 123456789012 / 100 = 1234567890.12, m = 1234567890.
/// - 9.9999999999: d = 0, k = 9, v = 9999999999.9, v + 0.5 = 10000000000.4, so m = 10^10:
///   the carry makes m = 10^9, d = 1.
/// - 1.5e-299: d = -299 (the lowest decimal decade), k = 308, the exact product is
///   1499999999.99999993..., v = 1500000000, m = 1500000000.
/// - 1e-300 (d = -300), 1e305 (d = 305), 1e-310 (subnormal), infinity: the fallback.
#[test]
fn canonical_numbers_worked_by_hand() {
    let cases = [
        (12.87, decimal(1_287_000_000, 1)),
        (12.87 + 1e-12, decimal(1_287_000_000, 1)),
        (12.88, decimal(1_288_000_000, 1)),
        (2.0 / 3.0, decimal(6_666_666_667, -1)),
        (-0.5, decimal(-5_000_000_000, -1)),
        (0.1, decimal(1_000_000_000, -1)),
        (123_456_789_012.0, decimal(1_234_567_890, 11)),
        (9.9999999999, decimal(1_000_000_000, 1)),
        (1.5e-299, decimal(1_500_000_000, -299)),
        (0.0, decimal(0, 0)),
        (-0.0, decimal(0, 0)),
        (1e-300, NumberCell::Bits(1e-300f64.to_bits())),
        (1e305, NumberCell::Bits(1e305f64.to_bits())),
        (-1e-310, NumberCell::Bits((-1e-310f64).to_bits())),
        (f64::INFINITY, NumberCell::Bits(f64::INFINITY.to_bits())),
    ];
    for (x, want) in cases {
        assert_eq!(canonical_number(x), want, "{x:e}");
    }
    // Spellings of one number are one double, so one cell.
    for s in ["12.870", "1.287e1", "0012.87"] {
        assert_eq!(canonical_number(s.parse().unwrap()), cases[0].1, "{s}");
    }
    assert_eq!(
        decimal(-5_000_000_000, -1).bytes(),
        [1, 0, 0x0e, 0xfa, 0xd5, 0xfe, 0xff, 0xff, 0xff, 0xff, 0xff]
    );
    assert_eq!(
        NumberCell::Bits(1.0f64.to_bits()).bytes(),
        [3, 0, 0, 0, 0, 0, 0, 0xf0, 0x3f]
    );
}

/// The decade comes from the binary exponent and one comparison; it must be the one a plain
/// search over the powers finds, at the powers themselves, beside them, and at both ends of
/// every binary exponent.
#[test]
fn the_decade_is_the_one_a_plain_search_finds() {
    let p = powers();
    let plain = |a: f64| (-SPAN..SPAN).rev().find(|&j| p[(j + SPAN) as usize] <= a);
    let mut values = Vec::new();
    for j in -307..=308i64 {
        let pj = p[(j + SPAN) as usize];
        values.extend([
            pj,
            f64::from_bits(pj.to_bits() - 1),
            f64::from_bits(pj.to_bits() + 1),
        ]);
    }
    for biased in 1..2047u64 {
        values.extend([
            f64::from_bits(biased << 52),
            f64::from_bits((biased << 52) | ((1 << 52) - 1)),
        ]);
    }
    for a in values.into_iter().filter(|a| a.is_normal()) {
        let biased = (a.to_bits() >> 52) as i64;
        assert_eq!(Some(decade(a, biased, p)), plain(a), "{a:e}");
    }
}

/// The table-driven path for usual numbers equals the definition step by step wherever it
/// answers, and answers for every normal number of a usual decade: every binary exponent,
/// both signs, several mantissas (the ends, the middle, pseudo-random ones).
#[test]
fn the_fast_path_equals_the_definition() {
    let (p, t) = (powers(), binades());
    let mut state = 0x2545f4914f6cdd1du64;
    let mut answered = 0;
    for biased in 0..2048u64 {
        let mut mantissas = vec![0, (1 << 52) - 1, 1 << 51];
        for _ in 0..40 {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            mantissas.push(state >> 12);
        }
        for mant in mantissas {
            for sign in [0, 1u64 << 63] {
                let x = f64::from_bits(sign | (biased << 52) | mant);
                let (m, d, ok) = common(x, t);
                let usual = x.is_normal() && USUAL.contains(&decade(x.abs(), biased as i64, p));
                assert_eq!(ok, usual, "{x:e}");
                if ok {
                    answered += 1;
                    assert_eq!(NumberCell::Decimal { m, d }, general(x, p), "{x:e}");
                }
            }
        }
    }
    assert!(answered > 40_000, "{answered}");
}

/// The pinned table: recipe columns Weight, colour, size (in byte order 'W' sorts first), and
/// a target that is not in the recipe.
fn pinned() -> Table {
    table(vec![
        numeric("target", &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]),
        numeric("size", &[12.87, f64::NAN, -0.0, 1e-310, 1e-300, 2.0 / 3.0]),
        text(
            "colour",
            &["   ", " 3.50 ", " Light Blue ", "1e3", "red"],
            &[4, 2, 1, MISSING_CODE, 0, 3],
        ),
        numeric(
            "Weight",
            &[-0.5, 0.0, 9.9999999999, 1e305, 123_456_789_012.0, 1.5e-299],
        ),
    ])
}

/// Digests computed by `tests/reference/identity_v3.py` with Python 3.11 `hashlib` (SHA-256),
/// `struct` and `decimal`, from the definition in the module documentation. The rows cover a
/// number, text, a negative number (row 0); a missing number, a trimmed text with capitals,
/// zero (row 1); -0.0, a number in a text column, the carry (row 2); a subnormal, a missing
/// text, a huge number (row 3); 1e-300 (fallback), a text of spaces only (missing), a number
/// divided by a power (row 4); 2/3, `1e3` in a text column, the lowest decimal decade (row 5).
#[test]
fn feature_identities_are_pinned() {
    let want = [
        "49946f0691d3a4bb7921784d563b7283",
        "ca5086beefe6f998dde74970d29533f4",
        "1c465db67f8bc1de9b7ea849579e43d9",
        "c06f29427ef00f429dcbbf55ed6fdb5b",
        "faf5712eb06d882cccf457e1de7ac06e",
        "2c12c2b7a53f33ad74e61e31ba3fdda3",
    ];
    let t = pinned();
    let recipe = Recipe::new(None, &["size", "colour", "Weight", "size"]);
    assert_eq!(recipe.columns(), ["Weight", "colour", "size"]);
    let ids = feature_ids(&t, &recipe, &all(&t), 1).unwrap();
    let got: Vec<String> = ids.iter().map(hexed).collect();
    assert_eq!(got, want);
    for (r, id) in ids.iter().enumerate() {
        assert_eq!(feature_ids(&t, &recipe, &[r], 1).unwrap()[0], *id);
    }
    // The same rows with the colours read as numbers where they are numbers: the script's
    // `row2_number_colour` and `row5_number_colour` equal rows 2 and 5.
    let mut n = pinned();
    n.columns[2] = numeric(
        "colour",
        &[f64::NAN, f64::NAN, 3.5, f64::NAN, f64::NAN, 1000.0],
    );
    let ids_n = feature_ids(&n, &recipe, &[2, 5], 1).unwrap();
    assert_eq!(ids_n, [ids[2], ids[5]]);
    // A recipe column the table lacks: no identity.
    let lacking = Recipe::new(None, &["size", "shade"]);
    assert_eq!(feature_ids(&t, &lacking, &[0], 1), None);
}

/// Labelled identities from the same script (Python 3.11 `hashlib`): rows 0 to 2 of the pinned
/// table with a numeric target (151 + 1e-12, which rounds to 151), a text target with spaces
/// (` yes `) and a missing one.
#[test]
fn labelled_identities_are_pinned() {
    let want = [
        "90c4b80d27ebc6bbb4c408136abf838f",
        "f037e3b3155204c99ca7f7f1f7a40c34",
        "b918abe604b287eac745e455d116da0f",
    ];
    let mut t = pinned();
    t.columns
        .push(numeric("y", &[151.0 + 1e-12, 0.0, f64::NAN, 0.0, 0.0, 0.0]));
    t.columns
        .push(text("label", &[" yes "], &[0, 0, 0, 0, 0, 0]));
    let recipe = Recipe::new(None, &["size", "colour", "Weight"]);
    let features = feature_ids(&t, &recipe, &[0, 1, 2], 1).unwrap();
    let numeric_target = labelled_ids(&t, &recipe, 4, &[0, 2], 2).unwrap();
    let text_target = labelled_ids(&t, &recipe, 5, &[1], 1).unwrap();
    let got = [numeric_target[0].1, text_target[0].1, numeric_target[1].1];
    assert_eq!(got.iter().map(hexed).collect::<Vec<_>>(), want);
    // Each pair carries the row's feature identity beside it.
    assert_eq!(
        [numeric_target[0].0, text_target[0].0, numeric_target[1].0],
        [features[0], features[1], features[2]]
    );
    // The same features with another target are another labelled row.
    let other = labelled_ids(&t, &recipe, 4, &[1], 1).unwrap();
    assert_eq!(other[0].0, features[1]);
    assert_ne!(other[0].1, text_target[0].1);
}

/// From the same script (Python 3.11 `hashlib`; numbers written plain with `decimal`): a text
/// key with spaces and capitals (`abc def`), a non-ASCII capital (`äb`), and numeric keys
/// 1234.5, 1e21 (`1000000000000000000000`), -0.0 (`-0`, as `display_f64` writes it), 7 (`7`)
/// and 1e-7 (`0.0000001`).
#[test]
fn key_identities_are_pinned() {
    let t = table(vec![
        text("id", &[" AbC Def ", "\u{c4}B"], &[0, 1]),
        numeric("n", &[1234.5, 1e21]),
    ]);
    let u = table(vec![numeric("n", &[-0.0, 7.0, 1e-7])]);
    let got: Vec<String> = key_ids(&t, 0, &[0, 1], 1)
        .into_iter()
        .chain(key_ids(&t, 1, &[0, 1], 1))
        .chain(key_ids(&u, 0, &[0, 1, 2], 1))
        .map(|k| hexed(&k.unwrap()))
        .collect();
    assert_eq!(
        got,
        [
            "9e645d87018f1710ad517d20457afad0",
            "8304c7ea5adec15b014cee5449911cb2",
            "4558191bff9c5d4901ce3f0d8190f9e1",
            "1614347639eb76d82dd536b47e3346f9",
            "d796dd2584d6c55ed3b9eae5d3005e55",
            "b5f132fa8024c192ee192c9150513492",
            "69de5a7d3899666accdd26f631eaf3a4",
        ]
    );
}

#[test]
fn key_identities_ignore_the_name_case_and_spaces() {
    let a = table(vec![text("id", &["  Ab-7 ", "x"], &[0, 1])]);
    let b = table(vec![
        numeric("other", &[0.0, 0.0, 0.0]),
        text("ID", &["AB-7", "ab-7", "x"], &[1, 0, 2]),
    ]);
    let ka = key_ids(&a, 0, &[0, 1], 1);
    let kb = key_ids(&b, 1, &[0, 1, 2], 1);
    assert_eq!([kb[0], kb[1], kb[2]], [ka[0], ka[0], ka[1]]);
    assert!(ka[0].is_some() && ka[0] != ka[1]);
    // The same key read as numbers and as text; 1.50 is the number 1.5.
    let n = p("k\n1.50\n20\n", &[]);
    let s = table(vec![text("key", &["1.5", "20"], &[0, 1])]);
    assert_eq!(key_ids(&n, 0, &[0, 1], 1), key_ids(&s, 0, &[0, 1], 1));
    // Missing and blank keys have no identity; N threads give the one-thread answer.
    let m = table(vec![
        numeric("n", &[f64::NAN, 1.0]),
        text("t", &[" \t ", "a"], &[0, MISSING_CODE]),
    ]);
    assert_eq!(key_ids(&m, 0, &[0], 1), [None]);
    assert_eq!(key_ids(&m, 1, &[0, 1], 1), [None, None]);
    let many = table(vec![numeric(
        "n",
        &(0..9001).map(f64::from).collect::<Vec<_>>(),
    )]);
    let rows: Vec<usize> = (0..9001).rev().collect();
    let one = key_ids(&many, 0, &rows, 1);
    for threads in [2, 3] {
        assert_eq!(key_ids(&many, 0, &rows, threads), one);
    }
}

/// A value of 0.1 to 999.999 with 6 significant digits, for the reference file's row `i`,
/// column `j`: read from text, so it is the double nearest the decimal.
fn v(i: usize, j: usize) -> f64 {
    let m = 100_000 + (i * 7919 + j * 104_729) % 900_000;
    let e = (i + j) % 4;
    format!("{m}e{}", e as i64 - 6).parse::<f64>().unwrap()
}

/// A file with the recipe columns x1 and x2 (numbers) and colour (text, one cell in four
/// missing), an id and a target.
fn reference_file(rows: usize) -> String {
    let mut s = String::from("id,x1,colour,x2,target\n");
    for i in 0..rows {
        s.push_str(&format!(
            "{i},{},{},{},{}\n",
            v(i, 1),
            ["Red", "green", "", "blue"][i % 4],
            v(i, 2),
            i % 3
        ));
    }
    s
}

/// The edits version 3 ignores: column order, an extra column, a missing non-recipe column,
/// the target renamed or dropped, numbers spelled differently, a number column read as text,
/// and one feature moved by 1e-12. A change in the 9th significant digit is seen.
#[test]
fn feature_identities_ignore_what_a_model_cannot_see() {
    let rows = 400;
    let recipe = Recipe::new(Some("id"), &["x1", "x2", "colour"]);
    let base = p(&reference_file(rows), &[]);
    let want = feature_ids(&base, &recipe, &all(&base), 1).unwrap();
    // Every row is its own row here, so equal lists mean row-for-row equality.
    let mut distinct = want.clone();
    distinct.sort();
    distinct.dedup();
    assert_eq!(distinct.len(), rows);

    let mut variants: Vec<(&str, Table)> = Vec::new();
    // Columns reordered, a junk column added, the target renamed, x1 spelled with trailing
    // zeros or an exponent.
    let mut s = String::from("target_y,junk,x2,colour,x1,id\n");
    for i in 0..rows {
        let x1 = if i % 2 == 0 {
            format!("{:.6}", v(i, 1))
        } else {
            format!("{:e}", v(i, 1))
        };
        s.push_str(&format!(
            "{},j{},{},{},{x1},{i}\n",
            i % 3,
            i % 5,
            v(i, 2),
            ["Red", "green", "", "blue"][i % 4]
        ));
    }
    variants.push(("reordered, renamed target, junk, spellings", p(&s, &[])));
    // The target and the id dropped; x2 read as text.
    let mut s = String::from("colour,x2,x1\n");
    for i in 0..rows {
        s.push_str(&format!(
            "{},{:e},{}\n",
            ["Red", "green", "", "blue"][i % 4],
            v(i, 2),
            v(i, 1)
        ));
    }
    variants.push(("no target, no id, x2 as text", p(&s, &["x2"])));
    // x2 moved by +1e-12.
    let mut s = String::from("id,x1,colour,x2,target\n");
    for i in 0..rows {
        s.push_str(&format!(
            "{i},{},{},{},{}\n",
            v(i, 1),
            ["Red", "green", "", "blue"][i % 4],
            v(i, 2) + 1e-12,
            i % 3
        ));
    }
    let shifted = p(&s, &[]);
    match &shifted.columns[3].values {
        Values::Numeric(x) => assert!(x.iter().enumerate().all(|(i, &x)| x != v(i, 2))),
        Values::Text { .. } => panic!("x2 is numeric"),
    }
    variants.push(("x2 + 1e-12", shifted));
    for (what, t) in &variants {
        assert_eq!(feature_ids(t, &recipe, &all(t), 1).unwrap(), want, "{what}");
    }
    // One value changed in its 9th significant digit: that row alone changes.
    let mut changed = base.clone();
    let r = 17;
    if let Values::Numeric(x) = &mut changed.columns[1].values {
        let d = x[r].abs().log10().floor();
        x[r] += 10f64.powf(d - 8.0);
    }
    let got = feature_ids(&changed, &recipe, &all(&changed), 1).unwrap();
    for i in 0..rows {
        assert_eq!(got[i] == want[i], i != r, "row {i}");
    }
    // Case is kept in text.
    let upper = p(&reference_file(rows).replace("green", "Green"), &[]);
    let got = feature_ids(&upper, &recipe, &all(&upper), 1).unwrap();
    assert!((0..rows).all(|i| (got[i] == want[i]) == (i % 4 != 1)));
}

/// Several blocks and threads, a row count that is not a multiple of the block, rows out of
/// order: every row gets the identity it gets alone.
#[test]
fn identities_do_not_depend_on_blocks_or_threads() {
    let rows = 10_001;
    assert_ne!(rows % BLOCK, 0);
    let t = p(&reference_file(rows), &["id"]);
    let recipe = Recipe::new(None, &["x1", "x2", "colour", "id"]);
    let order: Vec<usize> = (0..rows).rev().collect();
    let one = feature_ids(&t, &recipe, &order, 1).unwrap();
    assert_eq!(one.len(), rows);
    for threads in [2, 3] {
        assert_eq!(feature_ids(&t, &recipe, &order, threads).unwrap(), one);
    }
    for (k, &r) in one.iter().zip(&order).step_by(97) {
        assert_eq!(*k, feature_ids(&t, &recipe, &[r], 1).unwrap()[0]);
    }
    assert_eq!(
        feature_ids(&t, &recipe, &[], 3).unwrap(),
        Vec::<RowKey>::new()
    );
}

#[test]
fn recipes_round_trip_through_json_and_refuse_other_shapes() {
    let r = Recipe::new(Some("id"), &["b".to_string(), "a".into(), "b".into()]);
    assert_eq!(r.key(), Some("id"));
    let j = r.to_json();
    assert_eq!(j.to_string(), r#"{"columns":["a","b"],"key":"id"}"#);
    assert_eq!(Recipe::from_json(&j), Some(r));
    let none = Recipe::new::<&str>(None, &["x"]);
    assert_eq!(Recipe::from_json(&none.to_json()), Some(none));
    for bad in [
        r#"{"columns":["b","a"],"key":null}"#,
        r#"{"columns":["a","a"],"key":null}"#,
        r#"{"columns":["a"],"key":null,"extra":1}"#,
        r#"{"columns":["a"]}"#,
        r#"{"columns":[1],"key":null}"#,
        r#"{"columns":["a"],"key":3}"#,
        r#"["a"]"#,
    ] {
        let v: serde_json::Value = serde_json::from_str(bad).unwrap();
        assert_eq!(Recipe::from_json(&v), None, "{bad}");
    }
}
