//! Tests of row identity version 3 and development fingerprints: pinned values, the canonical
//! number form and fingerprint words worked by hand, invariance under the edits they are meant
//! to ignore, and equal values at any thread count.

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
        raw: Default::default(),
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

/// The pinned table: the columns ` Size `, `colour` and `Weight`, read as the recipe columns
/// colour, size and weight (normalised, in byte order), and a target that is not in the recipe.
fn pinned() -> Table {
    table(vec![
        numeric("target", &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]),
        numeric(
            " Size ",
            &[12.87, f64::NAN, -0.0, 1e-310, 1e-300, 2.0 / 3.0],
        ),
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
/// `struct` and `decimal`, from the definition in the module documentation. The header hashes
/// the normalised names. The rows cover a number, text, a negative number (row 0); a missing
/// number, a trimmed text with capitals (lower-cased), zero (row 1); -0.0, a number in a text
/// column, the carry (row 2); a subnormal, a missing text, a huge number (row 3); 1e-300
/// (fallback), a text of spaces only (missing), a number divided by a power (row 4); 2/3, `1e3`
/// in a text column, the lowest decimal decade (row 5).
#[test]
fn feature_identities_are_pinned() {
    let want = [
        "1ec23d731ca18f2f10f942873ca28299",
        "8d971df17abecabda6b9960da7c5322e",
        "3b8db2ea1570aee123a25c655658380f",
        "ca4664a03827dd7340d6840bbd3ca157",
        "b846713140946c3edc807fc2823bfd52",
        "61bab049fb53964a4643decc694833e0",
    ];
    let t = pinned();
    let recipe = Recipe::new(None, &["size", "colour", "Weight", " SIZE"]);
    assert_eq!(recipe.columns(), ["colour", "size", "weight"]);
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

/// The pinned table with two more targets: `y` (151 + 1e-12, which rounds to 151, then a
/// missing one at row 2) and `label` (` Yes `, with capitals and spaces).
fn pinned_with_labels() -> Table {
    let mut t = pinned();
    t.columns
        .push(numeric("y", &[151.0 + 1e-12, 0.0, f64::NAN, 0.0, 0.0, 0.0]));
    t.columns
        .push(text("label", &[" Yes "], &[0, 0, 0, 0, 0, 0]));
    t
}

/// Labelled identities from the same script (Python 3.11 `hashlib`): rows 0 to 2 of the pinned
/// table with a numeric target (151 + 1e-12), a text target with capitals and spaces
/// (` Yes `) and a missing one.
#[test]
fn labelled_identities_are_pinned() {
    let want = [
        "69b32adddae451b768d38240a76e85f3",
        "9bf19e2948ed5dd3682682905985f765",
        "686a198f9e22d4a94f314a358e6dc48f",
    ];
    let t = pinned_with_labels();
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
    // Text is lower-cased, so capitals and spaces are not seen; another word is.
    let upper = p(&reference_file(rows).replace("green", " GREEN"), &[]);
    assert_eq!(feature_ids(&upper, &recipe, &all(&upper), 1).unwrap(), want);
    let other = p(&reference_file(rows).replace("green", "teal"), &[]);
    let got = feature_ids(&other, &recipe, &all(&other), 1).unwrap();
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
    let r = Recipe::new(Some(" ID"), &["b".to_string(), "A ".into(), "B".into()]);
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
        // Names `Recipe::new` would have normalised.
        r#"{"columns":["A","b"],"key":null}"#,
        r#"{"columns":[" a"],"key":null}"#,
        r#"{"columns":["a"],"key":"ID"}"#,
        r#"{"columns":["a"],"key":"id "}"#,
    ] {
        let v: serde_json::Value = serde_json::from_str(bad).unwrap();
        assert_eq!(Recipe::from_json(&v), None, "{bad}");
    }
}

/// `from_json` refuses a name that normalising would change, so what `Recipe::new` stores must
/// come out of a second normalising unchanged: every character alone and after a letter (Greek
/// capital sigma lower-cases by its context), and names round-trip through JSON.
#[test]
fn normalising_twice_changes_nothing() {
    for c in (0..=0x10_ffffu32).filter_map(char::from_u32) {
        for name in [format!("{c}"), format!("\u{391}{c}"), format!(" x{c}\t")] {
            let once = normalise(&name);
            assert_eq!(normalise(&once), once, "{name:?}");
        }
    }
    let r = Recipe::new(
        Some("\u{130}D"),
        &["\u{39f}\u{394}\u{39f}\u{3a3}", " \u{c4}B "],
    );
    assert_eq!(r.key(), Some("i\u{307}d"));
    assert_eq!(r.columns(), ["\u{e4}b", "\u{3bf}\u{3b4}\u{3bf}\u{3c2}"]);
    assert_eq!(Recipe::from_json(&r.to_json()), Some(r));
}

/// `BMI`, ` bmi ` and `bmi` are one column: the recipe, every kind of identity and the
/// fingerprints are those of the table whose header says `bmi`; a table with two columns that
/// normalise alike is read by the first.
#[test]
fn column_names_are_normalised() {
    let bmi = [22.5, 31.0, f64::NAN];
    let age = [40.0, 51.0, 63.0];
    let y = [0.0, 1.0, 1.0];
    let with = |b: &str, a: &str, k: &str| {
        table(vec![
            numeric(a, &age),
            text(k, &["a1", "b2", "c3"], &[0, 1, 2]),
            numeric(b, &bmi),
            numeric("y", &y),
        ])
    };
    let plain = with("bmi", "age", "id");
    let recipe = Recipe::new(Some("id"), &["bmi", "age"]);
    assert_eq!(Recipe::new(Some(" Id "), &["BMI", " bmi ", "Age"]), recipe);
    let rows = all(&plain);
    let want = (
        feature_ids(&plain, &recipe, &rows, 1).unwrap(),
        labelled_ids(&plain, &recipe, 3, &rows, 1).unwrap(),
        fingerprints(&plain, &recipe, 3, &rows, 1).unwrap(),
    );
    for t in [with("BMI", " Age", "ID"), with(" bmi ", "AGE\t", " id")] {
        assert_eq!(find(&t, "id"), Some(1));
        for (name, at) in [("bmi", 2), (" BMI", 2), ("Age ", 0), ("y", 3)] {
            assert_eq!(find(&t, name), Some(at), "{name}");
        }
        for r in [&recipe, &Recipe::new(Some("iD"), &[" BMI", "age"])] {
            let got = (
                feature_ids(&t, r, &rows, 1).unwrap(),
                labelled_ids(&t, r, 3, &rows, 1).unwrap(),
                fingerprints(&t, r, 3, &rows, 1).unwrap(),
            );
            assert_eq!(got, want);
        }
    }
    assert_eq!(find(&plain, "weight"), None);
    assert_eq!(
        fingerprints(&plain, &Recipe::new(None, &["weight"]), 3, &rows, 1),
        None
    );
    // Two columns that normalise alike: the first is read, whichever spelling it has.
    let two = table(vec![
        numeric("BMI", &bmi),
        numeric("bmi", &age),
        numeric("age", &age),
    ]);
    assert_eq!(find(&two, "bmi"), Some(0));
    assert_eq!(find(&two, "Bmi "), Some(0));
    let first_only = table(vec![numeric("bmi", &bmi), numeric("age", &age)]);
    let r = Recipe::new(None, &["bmi", "age"]);
    assert_eq!(
        feature_ids(&two, &r, &rows, 1),
        feature_ids(&first_only, &r, &rows, 1)
    );
    assert_ne!(
        feature_ids(&two, &r, &rows, 1),
        feature_ids(
            &table(vec![numeric("bmi", &age), numeric("age", &age)]),
            &r,
            &rows,
            1
        )
    );
}

/// Text cells are trimmed and lower-cased in features, targets and fingerprints: `Benign`,
/// ` benign` and `BENIGN ` are one cell (a non-ASCII capital too), `malignant` is another, and
/// a text that reads as a number (`1E3`) is the number 1000.
#[test]
fn text_cells_are_lower_cased() {
    let codes = [0, 1, 2, 3, 4, 5];
    let cells = |levels: &[&str]| {
        table(vec![
            text("shape", levels, &codes),
            text("class", levels, &codes),
            numeric("n", &[1.0; 6]),
        ])
    };
    let lower = cells(&[
        "benign",
        "benign",
        "benign",
        "malignant",
        "\u{e9}t\u{e9}",
        "1000",
    ]);
    let mixed = cells(&[
        "Benign",
        " benign",
        "BENIGN ",
        "malignant",
        "\u{c9}T\u{c9}",
        "1E3",
    ]);
    let recipe = Recipe::new(None, &["shape", "n"]);
    let rows = all(&lower);
    for t in [&lower, &mixed] {
        let f = feature_ids(t, &recipe, &rows, 1).unwrap();
        let l = labelled_ids(t, &recipe, 1, &rows, 1).unwrap();
        let fp = fingerprints(t, &recipe, 1, &rows, 1).unwrap();
        assert_eq!((f[0], l[0], fp[0]), (f[1], l[1], fp[1]));
        assert_eq!((f[0], l[0], fp[0]), (f[2], l[2], fp[2]));
        assert_ne!(f[0], f[3]);
        assert_ne!(l[0], l[3]);
        assert_ne!(fp[0], fp[3]);
    }
    assert_eq!(
        feature_ids(&mixed, &recipe, &rows, 1),
        feature_ids(&lower, &recipe, &rows, 1)
    );
    assert_eq!(
        labelled_ids(&mixed, &recipe, 1, &rows, 1),
        labelled_ids(&lower, &recipe, 1, &rows, 1)
    );
    assert_eq!(
        fingerprints(&mixed, &recipe, 1, &rows, 1),
        fingerprints(&lower, &recipe, 1, &rows, 1)
    );
    // The number 1000 in a numeric column: the same cell as the text `1E3`.
    let number = table(vec![
        numeric("shape", &[1000.0]),
        numeric("class", &[1000.0]),
        numeric("n", &[1.0]),
    ]);
    assert_eq!(
        fingerprints(&number, &recipe, 1, &[0], 1).unwrap()[0],
        fingerprints(&mixed, &recipe, 1, &[5], 1).unwrap()[0]
    );
    assert_eq!(
        labelled_ids(&number, &recipe, 1, &[0], 1).unwrap()[0],
        labelled_ids(&mixed, &recipe, 1, &[5], 1).unwrap()[0]
    );
}

/// Words worked by hand from the definition, from the canonical forms pinned above:
/// - 12.87: m = 1287000000 (0x4cb6_0fc0), d = 1, d + 512 = 513 (0x201): 0x4002_0100_4cb6_0fc0;
/// - -0.5: m = -5000000000, in 40 bits 2^40 - 5e9 = 1094511627776 (0xfe_d5fa_0e00), d = -1,
///   511 (0x1ff): 0x4001_fffe_d5fa_0e00;
/// - 9.9999999999 after the carry: m = 10^9 (0x3b9a_ca00), d = 1: 0x4002_0100_3b9a_ca00;
/// - zero: m = 0, d = 0, 512: 0x4002_0000_0000_0000;
/// - the highest decade after a carry, d = 301: 813 (0x32d): 0x4003_2d00_3b9a_ca00.
///
/// FNV-1a of nothing is its offset basis, and of `a` and `foobar` the values published with
/// the algorithm (0xaf63dc4c8601ec8c, 0x85944171f73967e8), which the reference script also
/// gives. fmix64 maps 0 to 0 (shifts and products of 0).
#[test]
fn fingerprint_words_worked_by_hand() {
    assert_eq!(canonical_number(12.87).word(), 0x4002_0100_4cb6_0fc0);
    assert_eq!(canonical_number(-0.5).word(), 0x4001_fffe_d5fa_0e00);
    assert_eq!(canonical_number(9.9999999999).word(), 0x4002_0100_3b9a_ca00);
    assert_eq!(canonical_number(-0.0).word(), 0x4002_0000_0000_0000);
    assert_eq!(decimal_word(1_000_000_000, 301), 0x4003_2d00_3b9a_ca00);
    assert_eq!(
        NumberCell::Bits(1.0f64.to_bits()).word(),
        (3 << 62) ^ fmix64(0x3ff0_0000_0000_0000)
    );
    assert_eq!(fnv1a64(b""), 0xcbf2_9ce4_8422_2325);
    assert_eq!(fnv1a64(b"a"), 0xaf63_dc4c_8601_ec8c);
    assert_eq!(fnv1a64(b"foobar"), 0x8594_4171_f739_67e8);
    assert_eq!(fmix64(0), 0);
    // Text: trimmed and lower-cased before FNV-1a; a number's text is the number; blank is
    // missing.
    assert_eq!(
        text_word(" FooBar "),
        (2 << 62) | (0x8594_4171_f739_67e8 >> 2)
    );
    assert_eq!(text_word(" 12.870"), canonical_number(12.87).word());
    assert_eq!(text_word(" \t"), 0);
}

/// The fingerprint's table-driven word equals the definition's word wherever its top bit is
/// clear, and its top bit is set exactly where `common` does not answer: every binary
/// exponent, both signs, several mantissas, and the powers of ten with their neighbours (just
/// below a power, m rounds up to 10^10: the carry).
#[test]
fn the_fast_word_equals_the_definition() {
    let (p, t, s) = (powers(), binades(), signed());
    let mut values = Vec::new();
    let mut state = 0x9e37_79b9_7f4a_7c15u64;
    for biased in 0..2048u64 {
        let mut mantissas = vec![0, (1 << 52) - 1, 1 << 51];
        for _ in 0..40 {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            mantissas.push(state >> 12);
        }
        values.extend(
            mantissas
                .into_iter()
                .map(|m| f64::from_bits((biased << 52) | m)),
        );
    }
    for j in -SPAN..=SPAN {
        let pj = p[(j + SPAN) as usize];
        if pj.is_finite() && pj > 0.0 {
            values.extend([
                pj,
                f64::from_bits(pj.to_bits() - 1),
                f64::from_bits(pj.to_bits() + 1),
            ]);
        }
    }
    values.extend([0.0, f64::NAN, f64::INFINITY, 9.9999999999, 0.99999999999]);
    let (mut answered, mut carries) = (0, 0);
    for x in values.into_iter().flat_map(|x| [x, -x]) {
        let w = usual_word(x, s);
        let (_, d, ok) = common(x, t);
        assert_eq!(w & UNUSUAL == 0, ok, "{x:e}");
        if ok {
            answered += 1;
            assert_eq!(w, general(x, p).word(), "{x:e}");
            // The carry: the cell's decade is one above the number's own.
            let biased = (x.abs().to_bits() >> 52) as i64;
            carries += usize::from(i64::from(d) == decade(x.abs(), biased, p) + 1);
        }
        assert_eq!(number_word(x, t, p), canonical_or_missing(x), "{x:e}");
    }
    assert!(answered > 40_000, "{answered}");
    assert!(carries > 500, "{carries}");
}

/// The word of a number by the definition alone: 0 for NaN, else its canonical cell's word.
fn canonical_or_missing(x: f64) -> u64 {
    if x.is_nan() {
        0
    } else {
        canonical_number(x).word()
    }
}

/// Values computed by `tests/reference/identity_v3.py` (Python 3.11, standard library only):
/// every row of the pinned table with its target 1 to 6 (numbers, a negative number, the carry,
/// fallback numbers, missing cells, text with capitals and spaces, a number in a text column),
/// rows 0 to 2 with the targets of `pinned_with_labels` (a number, ` Yes `, a missing one), and
/// the keys of `key_identities_are_pinned`.
#[test]
fn fingerprints_are_pinned() {
    let hex = |f: &[u64]| f.iter().map(|f| format!("{f:016x}")).collect::<Vec<_>>();
    let t = pinned_with_labels();
    let recipe = Recipe::new(None, &["weight", "Colour", "SIZE"]);
    assert_eq!(
        hex(&fingerprints(&t, &recipe, 0, &all(&t), 1).unwrap()),
        [
            "9d44827d98cf0923",
            "9992d1b6561e1249",
            "76f505ec16c6616d",
            "7b338e7a3518e900",
            "80d82e627c94330f",
            "d9ac9d4ee7a1434d",
        ]
    );
    let numeric_target = fingerprints(&t, &recipe, 4, &[0, 2], 2).unwrap();
    let text_target = fingerprints(&t, &recipe, 5, &[1], 1).unwrap();
    assert_eq!(
        hex(&[numeric_target[0], text_target[0], numeric_target[1]]),
        ["4899f9160f900cfa", "aeb953c746290f22", "a4c541bfd599234d"]
    );
    let keys = table(vec![
        text("id", &[" AbC Def ", "\u{c4}B"], &[0, 1]),
        numeric("n", &[1234.5, 1e21]),
    ]);
    let more = table(vec![numeric("n", &[-0.0, 7.0, 1e-7])]);
    let got: Vec<u64> = key_fingerprints(&keys, 0, &[0, 1], 1)
        .into_iter()
        .chain(key_fingerprints(&keys, 1, &[0, 1], 1))
        .chain(key_fingerprints(&more, 0, &[0, 1, 2], 1))
        .map(|k| k.unwrap())
        .collect();
    assert_eq!(
        hex(&got),
        [
            "51ac38618785cdde",
            "0ede69c9cc5a22af",
            "6bfc8b2b962ed81e",
            "9f774ab13c30f00e",
            "75e30f0d8ad3e72a",
            "cf48ffa9f52ba797",
            "828121a146b7866e",
        ]
    );
    // Missing and blank keys have none, like their key identities.
    let m = table(vec![
        numeric("n", &[f64::NAN, 1.0]),
        text("t", &[" \t ", "a"], &[0, MISSING_CODE]),
    ]);
    assert_eq!(key_fingerprints(&m, 0, &[0, 1], 1)[0], None);
    assert_eq!(key_fingerprints(&m, 1, &[0, 1], 1), [None, None]);
}

/// Fingerprints keep what labelled identities keep on the reference file (column order, a
/// renamed target, spellings of numbers, a feature moved by 1e-12) and see a change in the
/// 9th significant digit in that row alone.
#[test]
fn fingerprints_ignore_what_labelled_identities_ignore() {
    let rows = 400;
    let recipe = Recipe::new(None, &["x1", "x2", "colour"]);
    let base = p(&reference_file(rows), &[]);
    let want = fingerprints(&base, &recipe, 4, &all(&base), 1).unwrap();
    let mut distinct = want.clone();
    distinct.sort();
    distinct.dedup();
    assert_eq!(distinct.len(), rows);
    let mut s = String::from("Target_Y,x2,COLOUR,x1\n");
    for i in 0..rows {
        s.push_str(&format!(
            "{},{:e},{},{:.6}\n",
            i % 3,
            v(i, 2) + 1e-12,
            [" red", "GREEN", "", "Blue "][i % 4],
            v(i, 1),
        ));
    }
    let moved = p(&s, &[]);
    assert_eq!(
        fingerprints(&moved, &recipe, 0, &all(&moved), 1).unwrap(),
        want
    );
    let mut changed = base.clone();
    let r = 17;
    if let Values::Numeric(x) = &mut changed.columns[3].values {
        let d = x[r].abs().log10().floor();
        x[r] += 10f64.powf(d - 8.0);
    }
    let got = fingerprints(&changed, &recipe, 4, &all(&changed), 1).unwrap();
    for i in 0..rows {
        assert_eq!(got[i] == want[i], i != r, "row {i}");
    }
}

/// Several blocks and threads, a row count that is not a multiple of the block, rows out of
/// order: every row gets the fingerprint it gets alone, and its key fingerprint likewise.
#[test]
fn fingerprints_do_not_depend_on_blocks_or_threads() {
    let rows = 10_001;
    assert_ne!(rows % FP_BLOCK, 0);
    let t = p(&reference_file(rows), &["id"]);
    let recipe = Recipe::new(None, &["x1", "x2", "colour", "id"]);
    let order: Vec<usize> = (0..rows).rev().collect();
    let one = fingerprints(&t, &recipe, 4, &order, 1).unwrap();
    let keys = key_fingerprints(&t, 0, &order, 1);
    assert_eq!((one.len(), keys.len()), (rows, rows));
    for threads in [2, 3] {
        assert_eq!(fingerprints(&t, &recipe, 4, &order, threads).unwrap(), one);
        assert_eq!(key_fingerprints(&t, 0, &order, threads), keys);
    }
    for ((f, k), &r) in one.iter().zip(&keys).zip(&order).step_by(97) {
        assert_eq!(*f, fingerprints(&t, &recipe, 4, &[r], 1).unwrap()[0]);
        assert_eq!(*k, key_fingerprints(&t, 0, &[r], 1)[0]);
    }
    assert_eq!(
        fingerprints(&t, &recipe, 4, &[], 3).unwrap(),
        Vec::<u64>::new()
    );
}

/// The definition written plainly, one row and one cell at a time.
fn plain_fingerprint(columns: &[&Column], r: usize) -> u64 {
    let (t, p) = (binades(), powers());
    let mut h = FINGERPRINT_START;
    for c in columns {
        let w = match &c.values {
            Values::Numeric(v) => number_word(v[r], t, p),
            Values::Text { codes, levels } => {
                levels.get(codes[r] as usize).map_or(0, |l| text_word(l))
            }
        };
        h = fmix64(h ^ w);
    }
    fmix64(h ^ columns.len() as u64)
}

/// The blocked computation (number columns two at a time, a block's unusual cells again the
/// slow way) equals the plain definition: number columns next to each other and apart, an odd
/// count of them, missing, subnormal and huge numbers scattered, several blocks and threads.
#[test]
fn fingerprints_equal_the_plain_definition() {
    let rows = 9000;
    assert!(rows > 2 * MIN_CHUNK);
    let num = |name: &str, k: usize, odd: f64| {
        let cells: Vec<f64> = (0..rows)
            .map(|i| if i % k == 0 { odd } else { v(i, k) - 500.0 })
            .collect();
        numeric(name, &cells)
    };
    let codes: Vec<u32> = (0..rows as u32)
        .map(|i| [0, 1, 2, MISSING_CODE][i as usize % 4])
        .collect();
    let t = table(vec![
        num("a", 7, f64::NAN),
        num("b", 11, 1e-310),
        text("c", &["Red", " 2.5", "x y"], &codes),
        num("d", 13, 1e305),
        num("e", 17, -0.0),
        num("f", 19, 9.9999999999),
        num("y", 23, f64::NAN),
    ]);
    let order: Vec<usize> = (0..rows).map(|i| (i * 7919) % rows).collect();
    for features in [
        &["a", "b", "c", "d", "e", "f"][..],
        &["b", "d", "e"],
        &["c"],
        &["a"],
    ] {
        let recipe = Recipe::new(None, features);
        let columns: Vec<&Column> = recipe
            .columns()
            .iter()
            .map(|n| &t.columns[find(&t, n).unwrap()])
            .chain([&t.columns[6]])
            .collect();
        let want: Vec<u64> = order
            .iter()
            .map(|&r| plain_fingerprint(&columns, r))
            .collect();
        for threads in [1, 3] {
            assert_eq!(
                fingerprints(&t, &recipe, 6, &order, threads).unwrap(),
                want,
                "{features:?}"
            );
        }
    }
}
