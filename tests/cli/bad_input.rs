//! Every user mistake ends with exit code 2, one message naming the place and the fix, and an
//! unchanged ledger.

use crate::fixtures::{SMALL_SPEC, small_csv, small_dir};
use crate::util::Dir;

/// A folder with a ledger holding one good run, so "unchanged" is a real comparison.
fn with_ledger(name: &str) -> Dir {
    let d = small_dir(name);
    d.probity(&["run", "small.toml"]).expect(0);
    d
}

/// Run `args`, expect exit 2 and every fragment in stderr, and an unchanged ledger.
fn refused(d: &Dir, args: &[&str], fragments: &[&str]) {
    let before = d.counts();
    let r = d.probity(args).expect(2);
    let err = r.stderr();
    assert!(err.starts_with("probity: "), "{err}");
    assert_eq!(
        err.trim_end().lines().count(),
        1,
        "one message, one line: {err}"
    );
    for f in fragments {
        assert!(err.contains(f), "expected {f:?} in: {err}");
    }
    assert_eq!(
        d.counts(),
        before,
        "the ledger changed after a refused command"
    );
}

fn spec_case(name: &str, from: &str, to: &str, fragments: &[&str]) {
    let d = with_ledger(name);
    assert!(SMALL_SPEC.contains(from), "fixture lacks {from:?}");
    d.write("bad.toml", &SMALL_SPEC.replace(from, to));
    refused(&d, &["run", "bad.toml"], fragments);
}

fn data_case(name: &str, csv: &str, fragments: &[&str]) {
    let d = with_ledger(name);
    d.write("bad.csv", csv);
    d.write(
        "bad.toml",
        &SMALL_SPEC.replace("path = \"small.csv\"", "path = \"bad.csv\""),
    );
    refused(&d, &["run", "bad.toml"], fragments);
}

#[test]
fn toml_syntax_error_has_line_and_column() {
    spec_case("syntax", "seed = 5", "seed = = 5", &["bad.toml:12:"]);
}

#[test]
fn unknown_key_suggests_the_nearest() {
    spec_case(
        "unknown",
        "seed = 5",
        "seeed = 5",
        &[
            "bad.toml:12:1",
            "unknown key 'seeed'",
            "did you mean 'seed'?",
        ],
    );
}

#[test]
fn wrong_type_is_located() {
    spec_case(
        "type",
        "folds = 4",
        "folds = [4]",
        &["bad.toml:14:9", "folds must be an integer"],
    );
}

#[test]
fn empty_grid_and_duplicate_models() {
    spec_case(
        "emptygrid",
        "k = [1, 3]",
        "k = []",
        &["bad.toml:22:5", "no values"],
    );
    let dup = format!("{SMALL_SPEC}\n[[model]]\nkind = \"knn\"\nk = [1, 3]\n");
    let d = with_ledger("dupmodel");
    d.write("bad.toml", &dup);
    refused(
        &d,
        &["run", "bad.toml"],
        &["repeats the knn entry at line 20"],
    );
}

#[test]
fn regression_families_are_refused_for_classification() {
    spec_case(
        "classif",
        "task = \"regression\"",
        "task = \"classification\"",
        &[
            "bad.toml:16:1",
            "ridge does not serve a classification task",
        ],
    );
}

#[test]
fn missing_data_file() {
    spec_case(
        "nofile",
        "path = \"small.csv\"",
        "path = \"nowhere.csv\"",
        &["bad.toml:5:8", "nowhere.csv does not exist"],
    );
}

#[test]
fn unreadable_data_and_spec_files() {
    // A folder where the data file should be.
    let d = with_ledger("unreadable");
    std::fs::create_dir(d.path.join("dir.csv")).unwrap();
    d.write(
        "bad.toml",
        &SMALL_SPEC.replace("path = \"small.csv\"", "path = \"dir.csv\""),
    );
    refused(&d, &["run", "bad.toml"], &["dir.csv", "is a folder"]);
    // Bytes that are not UTF-8 text (a spreadsheet's legacy encoding, say), in the data and in
    // the spec.
    let mut bytes = small_csv().into_bytes();
    bytes.extend_from_slice(b"r99,1,2,caf\xe9,B1,1,3\n");
    std::fs::write(d.path.join("latin1.csv"), bytes).unwrap();
    d.write(
        "bad.toml",
        &SMALL_SPEC.replace("path = \"small.csv\"", "path = \"latin1.csv\""),
    );
    refused(&d, &["run", "bad.toml"], &["latin1.csv", "not valid UTF-8"]);
    let mut spec = SMALL_SPEC.as_bytes().to_vec();
    spec.extend_from_slice(b"# caf\xe9\n");
    std::fs::write(d.path.join("latin1.toml"), spec).unwrap();
    refused(&d, &["run", "latin1.toml"], &["latin1.toml", "UTF-8"]);
}

#[test]
fn missing_spec_file_and_folder_as_spec() {
    let d = with_ledger("nospec");
    refused(
        &d,
        &["run", "absent.toml"],
        &["cannot read spec", "absent.toml"],
    );
    std::fs::create_dir(d.path.join("folder.toml")).unwrap();
    refused(&d, &["run", "folder.toml"], &["is a folder"]);
}

#[test]
fn missing_target_column_suggests_a_name() {
    spec_case(
        "notarget",
        "target = \"y\"",
        "target = \"yy\"",
        &[
            "bad.toml:6:10",
            "target column 'yy' is not in",
            "did you mean 'y'?",
        ],
    );
}

#[test]
fn non_numeric_value_names_line_and_column() {
    let csv = small_csv().replacen("r6,3,", "r6,three,", 1);
    data_case(
        "nonnum",
        &csv,
        &["bad.csv:8 (column 'x1')", "'three' is not a number"],
    );
}

#[test]
fn non_finite_value_is_refused() {
    let csv = small_csv().replacen("r6,3,", "r6,NaN,", 1);
    data_case(
        "nan",
        &csv,
        &["bad.csv:8 (column 'x1')", "not a finite number"],
    );
    let csv = small_csv().replacen("r6,3,", "r6,inf,", 1);
    data_case("inf", &csv, &["bad.csv:8", "not a finite number"]);
}

#[test]
fn empty_header_only_duplicate_columns_and_ragged_rows() {
    data_case("empty", "", &["bad.csv", "empty"]);
    data_case(
        "header",
        "id,x1,x2,shade,bay,week,y\n",
        &["bad.csv:1", "no data rows"],
    );
    data_case(
        "dupcol",
        &small_csv().replacen("x2", "x1", 1),
        &["bad.csv:1 (column 'x1')", "appears twice"],
    );
    let mut lines: Vec<String> = small_csv().lines().map(String::from).collect();
    lines[5].push_str(",extra");
    data_case(
        "ragged",
        &(lines.join("\n") + "\n"),
        &["bad.csv:6", "8 fields but the header has 7"],
    );
}

#[test]
fn constant_target_is_refused() {
    let csv: String = small_csv()
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                format!("{l}\n")
            } else {
                format!("{},5\n", l.rsplit_once(',').unwrap().0)
            }
        })
        .collect();
    data_case(
        "constant",
        &csv,
        &["column 'y'", "same value (5) in every row"],
    );
}

#[test]
fn fewer_development_rows_than_folds() {
    spec_case(
        "folds",
        "folds = 4",
        "folds = 31",
        &["30 development rows are fewer than the 31 folds"],
    );
}

#[test]
fn k_larger_than_the_fitting_rows() {
    spec_case(
        "bigk",
        "k = [1, 3]",
        "k = [1, 25]",
        &["k = 25 is larger than the 22 fitting rows"],
    );
}

#[test]
fn group_split_with_too_few_groups() {
    let d = with_ledger("groups");
    d.write(
        "bad.toml",
        &SMALL_SPEC
            .replace("ignore = [\"bay\", \"week\"]", "ignore = [\"week\"]")
            .replace("method = \"random\"", "method = \"group\"\ngroup = \"bay\"")
            .replace("folds = 4", "folds = 7"),
    );
    refused(
        &d,
        &["run", "bad.toml"],
        &["groups, fewer than the 7 folds"],
    );
}

#[test]
fn sha256_pin_mismatch_prints_both_hashes() {
    let d = with_ledger("pin");
    let wrong = "0".repeat(64);
    d.write(
        "bad.toml",
        &SMALL_SPEC.replace(
            "key = \"id\"",
            &format!("key = \"id\"\nsha256 = \"{wrong}\""),
        ),
    );
    let actual = probity::data::file_sha256(&d.path.join("small.csv")).unwrap();
    refused(
        &d,
        &["run", "bad.toml"],
        &[&wrong, &actual, "bad.toml:8:10"],
    );
}

#[test]
fn duplicate_keys_are_refused() {
    let csv = small_csv().replacen("r1,", "r0,", 1);
    data_case(
        "dupkey",
        &csv,
        &[
            "bad.csv:3 (column 'id')",
            "key 'r0' repeats the key of line 2",
        ],
    );
}

#[test]
fn time_split_without_order_and_hash_without_key() {
    spec_case(
        "timeorder",
        "method = \"random\"",
        "method = \"time\"",
        &["method = \"time\" needs order"],
    );
    let d = with_ledger("hashkey");
    d.write(
        "bad.toml",
        &SMALL_SPEC
            .replace("key = \"id\"\n", "")
            .replace("method = \"random\"", "method = \"hash\""),
    );
    refused(
        &d,
        &["run", "bad.toml"],
        &["bad.toml:9:1", "method = \"hash\" needs [data] key"],
    );
}

#[test]
fn poly_feature_must_be_a_numeric_feature() {
    let d = with_ledger("polyfeat");
    d.write(
        "bad.toml",
        &format!("{SMALL_SPEC}\n[[model]]\nkind = \"poly\"\nfeature = \"shade\"\ndegree = [2]\n"),
    );
    refused(
        &d,
        &["run", "bad.toml"],
        &["poly feature 'shade' is not a numeric feature"],
    );
}

#[test]
fn bad_ledgers_are_refused() {
    let d = small_dir("ledgers");
    let r = d
        .probity(&["run", "small.toml", "--ledger", "missing/dir/ledger.sqlite"])
        .expect(2);
    assert!(r.stderr().contains("does not exist"), "{}", r.stderr());
    d.write(
        "notsqlite.sqlite",
        "this is a text file, not a database\n".repeat(200).as_str(),
    );
    let r = d
        .probity(&["run", "small.toml", "--ledger", "notsqlite.sqlite"])
        .expect(2);
    assert!(
        r.stderr().contains("not an SQLite database"),
        "{}",
        r.stderr()
    );
    // A ledger from a newer schema.
    let p = d.path.join("newer.sqlite");
    let c = rusqlite::Connection::open(&p).unwrap();
    c.pragma_update(None, "user_version", 999).unwrap();
    drop(c);
    let r = d
        .probity(&["run", "small.toml", "--ledger", "newer.sqlite"])
        .expect(2);
    assert!(
        r.stderr().contains("schema version 999 is newer"),
        "{}",
        r.stderr()
    );
}

#[test]
fn usage_errors_exit_2() {
    let d = Dir::new("usage");
    let r = d.probity(&["run"]);
    assert_eq!(r.code(), 2);
    let r = d.probity(&["frobnicate"]);
    assert_eq!(r.code(), 2);
    let r = d.probity(&["--help"]);
    assert_eq!(r.code(), 0);
    assert!(r.stdout().contains("Exit codes"), "{}", r.stdout());
}

#[test]
fn a_refused_run_in_a_fresh_folder_leaves_no_ledger() {
    let d = small_dir("fresh");
    d.write("bad.toml", &SMALL_SPEC.replace("k = [1, 3]", "k = [1, 25]"));
    d.probity(&["run", "bad.toml"]).expect(2);
    assert!(
        !d.path.join(".probity").exists(),
        "a refused run must not create a ledger"
    );
}

#[test]
fn contradictory_column_roles_are_refused() {
    spec_case(
        "roles",
        "ignore = [\"bay\", \"week\"]",
        "ignore = [\"bay\", \"week\"]\nfeatures = [\"x1\", \"bay\"]",
        &["bad.toml:9:19", "listed in both features and ignore"],
    );
    spec_case(
        "keyfeature",
        "ignore = [\"bay\", \"week\"]",
        "features = [\"x1\", \"id\"]",
        &["bad.toml:8:19", "key or split column"],
    );
}

/// A named pipe or a device as the data, the spec, the bundle or the ledger is refused (exit 2,
/// naming what it is) without waiting on it, and nothing is left beside it.
#[test]
fn pipes_and_devices_are_refused_without_blocking() {
    let d = with_ledger("pipes");
    let ok = std::process::Command::new("mkfifo")
        .arg(d.path.join("pipe"))
        .status()
        .unwrap();
    assert!(ok.success());
    let before = d.counts();
    let quick = |args: &[&str], fragments: &[&str]| {
        let r = d.probity_within(args, 30);
        assert_eq!(r.code(), 2, "{args:?}: {}", r.stderr());
        for f in fragments {
            assert!(
                r.stderr().contains(f),
                "{args:?}: expected {f:?} in {}",
                r.stderr()
            );
        }
        assert_eq!(d.counts(), before, "{args:?}");
    };
    for (data, kind) in [("pipe", "a named pipe"), ("/dev/zero", "a device")] {
        d.write(
            "p.toml",
            &SMALL_SPEC.replace("path = \"small.csv\"", &format!("path = \"{data}\"")),
        );
        quick(&["run", "p.toml"], &[kind, "not a CSV file"]);
        quick(&["check", "p.toml"], &[kind, "not a CSV file"]);
    }
    quick(&["run", "pipe"], &["a named pipe", "not a spec file"]);
    quick(&["merge", "pipe"], &["a named pipe", "not a bundle file"]);
    quick(&["merge", "/dev/zero"], &["a device", "not a bundle file"]);
    quick(
        &["run", "small.toml", "--ledger", "pipe"],
        &["a named pipe", "not a ledger file"],
    );
    let r = d.probity_within(&["run", "small.toml", "--ledger", "/dev/null"], 30);
    assert_eq!(r.code(), 2, "{}", r.stderr());
    assert!(r.stderr().contains("a device"), "{}", r.stderr());
    assert!(!std::path::Path::new("/dev/null-journal").exists());
    assert!(!std::path::Path::new("/dev/null-wal").exists());
}

/// A grid is counted before it is expanded: seven parameters of ten values (ten million
/// candidates) are refused at once, naming the [[model]] and the limit; the limit is the
/// spec's to set in [select].
#[test]
fn a_grid_over_the_candidate_limit_is_refused_before_it_is_expanded() {
    let d = with_ledger("grid-cap");
    let params: Vec<String> = (0..7)
        .map(|i| format!("p{i} = [0, 1, 2, 3, 4, 5, 6, 7, 8, 9]"))
        .collect();
    let toml = format!(
        "{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nrun = [\"true\"]\nparams = {{ {} }}\n",
        params.join(", ")
    );
    d.write("big.toml", &toml);
    let before = d.counts();
    let r = d.probity_within(&["check", "big.toml"], 30);
    assert_eq!(r.code(), 2, "{}", r.stderr());
    assert!(
        r.stderr().contains("big.toml:24:1")
            && r.stderr().contains("10000000 here alone")
            && r.stderr().contains("max_candidates = 100000"),
        "{}",
        r.stderr()
    );
    assert_eq!(d.counts(), before);
    // Ridge over 2,000 penalties passes by default and is refused under a limit of 1,000.
    let ridge = SMALL_SPEC.replace(
        "lambda = [0.1, 1, 10]",
        "lambda = { from = 0.001, to = 1000, steps = 2000, scale = \"log\" }",
    );
    d.write("r.toml", &ridge);
    d.probity(&["check", "r.toml"]).expect(0);
    d.write(
        "r.toml",
        &ridge.replace("[split]", "[select]\nmax_candidates = 1000\n\n[split]"),
    );
    refused(
        &d,
        &["run", "r.toml"],
        &["r.toml:", "more than 1000 candidates", "2000 here alone"],
    );
}

/// Positions and repeats are looked up, not rescanned: 50,000 [[model]] tables (half a minute
/// and more when every position was counted from the top) are checked at once, and a repeat of
/// the first table at the very end is named with both lines. A spec over 16 MiB is refused
/// before it is parsed.
#[test]
fn a_spec_of_many_model_tables_is_checked_in_linear_time() {
    let d = with_ledger("many-tables");
    let mut toml = SMALL_SPEC.replace("[split]", "[select]\nmax_candidates = 1000000\n\n[split]");
    let first = toml.lines().count() + 2;
    for i in 0..50_000 {
        toml.push_str(&format!(
            "\n[[model]]\nkind = \"ridge\"\nlambda = [{i}.5]\n"
        ));
    }
    toml.push_str("\n[[model]]\nkind = \"ridge\"\nlambda = [0.5]\n");
    let last = toml.lines().count() - 2;
    d.write("many.toml", &toml);
    let r = d.probity_within(&["check", "many.toml"], 60);
    assert_eq!(r.code(), 2, "{}", r.stderr());
    assert!(
        r.stderr().contains(&format!("many.toml:{last}:1"))
            && r.stderr()
                .contains(&format!("repeats the ridge entry at line {first}")),
        "{}",
        r.stderr()
    );
    let mut huge = SMALL_SPEC.to_string();
    huge.push_str(&format!("# {}\n", "x".repeat(17 << 20)));
    d.write("huge.toml", &huge);
    refused(&d, &["check", "huge.toml"], &["huge.toml", "over 16 MiB"]);
}

/// A family whose matrices grow with the columns squared is refused before it allocates them
/// when one fit needs more memory than is available (`--memory` here, so the case does not
/// depend on this machine), naming the [[model]] and both sizes; k-nearest neighbours on the
/// same file is not held to it.
#[test]
fn a_fit_larger_than_memory_is_refused_before_it_allocates() {
    let d = crate::util::Dir::new("memory");
    let cols = 2000;
    let mut csv: Vec<String> = (0..cols).map(|j| format!("x{j}")).collect();
    csv.push("y".into());
    let mut text = csv.join(",") + "\n";
    for i in 0..40u64 {
        let row: Vec<String> = (0..=cols as u64)
            .map(|j| ((i * 31 + j * 7) % 97).to_string())
            .collect();
        text.push_str(&row.join(","));
        text.push('\n');
    }
    d.write("wide.csv", &text);
    let spec = "name = \"wide\"\ntask = \"regression\"\n[data]\npath = \"wide.csv\"\ntarget = \"y\"\n[split]\nmethod = \"random\"\nseed = 1\ntest = 0.25\nfolds = 3\n\n[[model]]\nkind = \"ridge\"\nlambda = [1.0]\n";
    d.write("wide.toml", spec);
    for cmd in ["check", "run"] {
        let r = d.probity(&[cmd, "wide.toml", "--memory", "64M"]);
        assert_eq!(r.code(), 2, "{}", r.stderr());
        let err = r.stderr();
        assert!(
            err.contains("wide.toml:12:1")
                && err.contains("ridge: one fit on 20 rows of up to 2000 encoded columns")
                && err.contains("more than the 64.0 MiB of memory available"),
            "{err}"
        );
    }
    assert!(!d.ledger().exists(), "nothing stored");
    d.probity(&["check", "wide.toml", "--memory", "1G"])
        .expect(0);
    d.write(
        "knn.toml",
        &spec.replace(
            "kind = \"ridge\"\nlambda = [1.0]",
            "kind = \"knn\"\nk = [3]",
        ),
    );
    d.probity(&["check", "knn.toml", "--memory", "64M"])
        .expect(0);
    let r = d.probity(&["check", "wide.toml", "--memory", "lots"]);
    assert_eq!(r.code(), 2);
    assert!(r.stderr().contains("is not a size"), "{}", r.stderr());
}

/// A note longer than 16 KiB is refused, on `run --note` before the grid and by `note`,
/// and nothing is stored.
#[test]
fn an_overlong_note_is_refused() {
    let d = with_ledger("long-note");
    let long = "x".repeat(16 * 1024 + 1);
    refused(
        &d,
        &["run", "small.toml", "--note", &long],
        &["16385 bytes", "16384"],
    );
    refused(&d, &["note", "1", &long], &["16385 bytes", "16384"]);
    d.probity(&["note", "1", &"x".repeat(16 * 1024)]).expect(0);
}
