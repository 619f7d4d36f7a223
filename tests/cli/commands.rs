//! External command families through the binary: the protocol, the sealed target, failures,
//! replay consent and determinism.

use crate::fixtures::{SMALL_SPEC, small_dir};
use crate::util::Dir;

/// A model in plain Python: the mean of the fitting target, plus the `shift` parameter. It fails
/// loudly if the score file ever holds the target or the key.
const MEAN_MODEL: &str = r#"
import csv, json, os, sys
fit = list(csv.reader(open(os.environ["PROBITY_FIT"])))
score = list(csv.reader(open(os.environ["PROBITY_SCORE"])))
target = os.environ["PROBITY_TARGET"]
if target in score[0] or "id" in score[0]:
    sys.exit("the score file holds the target or the key: " + ",".join(score[0]))
if fit[0] != ["x1", "x2", "shade", "y"]:
    sys.exit("unexpected fit columns " + ",".join(fit[0]))
t = fit[0].index(target)
total = 0.0
for r in fit[1:]:
    total += float(r[t])
mean = total / (len(fit) - 1) + json.loads(os.environ["PROBITY_PARAMS"])["shift"]
with open(os.environ["PROBITY_OUT"], "w") as f:
    f.write("prediction\n")
    for _ in score[1:]:
        f.write(repr(mean) + "\n")
"#;

fn command_spec(script: &str, extra: &str) -> String {
    format!(
        "{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nrun = [\"python3\", \"{script}\"]\nparams = {{ shift = [0.0, 1.5] }}\ninputs = [\"{script}\"]\n{extra}"
    )
}

fn setup(name: &str, script: &str, extra: &str) -> Dir {
    let d = small_dir(name);
    d.write("model.py", script);
    d.write("c.toml", &command_spec("model.py", extra));
    d
}

#[test]
fn a_command_family_is_fitted_scored_and_revealed() {
    let d = setup("cmd", MEAN_MODEL, "");
    let j = d.probity(&["run", "c.toml", "--json"]).expect(0).json();
    let cands = j["candidates"].as_array().unwrap();
    assert_eq!(cands.len(), 8);
    let mean = &cands[0];
    let cmd0 = cands
        .iter()
        .find(|c| c["model"] == "command" && c["params"]["shift"] == 0.0)
        .unwrap();
    assert!(cmd0["failure"].is_null(), "{cmd0}");
    // Same model, same rows, same arithmetic order: the very same bits as the built-in mean.
    assert_eq!(cmd0["validation"], mean["validation"]);
    assert_eq!(cmd0["train"], mean["train"]);
    let cmd1 = cands.iter().find(|c| c["params"]["shift"] == 1.5).unwrap();
    assert!(cmd1["validation"]["rmse"].as_f64() > cmd0["validation"]["rmse"].as_f64());
    // Reveal and predict a command candidate: it is fitted again, on every development row.
    let id = cmd0["id"].as_i64().unwrap().to_string();
    let r = d
        .probity(&["reveal", "1", "--candidate", &id, "--yes", "--json"])
        .expect(0)
        .json();
    let m = d
        .probity(&["reveal", "1", "--candidate", "1", "--yes", "--json"])
        .expect(0)
        .json();
    assert_eq!(
        r["test"], m["test"],
        "the command's test scores equal the built-in mean's"
    );
    d.write("new.csv", "id,x1,x2,shade\nn1,1,2,low\nn2,3,4,high\n");
    d.probity(&[
        "predict",
        "1",
        "--input",
        "new.csv",
        "--output",
        "p.csv",
        "--candidate",
        &id,
    ])
    .expect(0);
    let out = std::fs::read_to_string(d.path.join("p.csv")).unwrap();
    assert_eq!(out.lines().count(), 3, "{out}");
    // Replay runs commands only with consent, then gives the same bits.
    let r = d.probity(&["replay", "1"]).expect(2);
    assert!(
        r.stderr().contains("--allow-commands") && r.stderr().contains("model.py"),
        "{}",
        r.stderr()
    );
    let r = d
        .probity(&["replay", "1", "--allow-commands", "--json"])
        .expect(0);
    assert!(r.stderr().contains("replay will run"), "{}", r.stderr());
    assert_eq!(r.json()["identical"], true);
    // A changed script shows in the replay.
    d.write("model.py", &format!("{MEAN_MODEL}\n# edited\n"));
    let j = d
        .probity(&["replay", "1", "--allow-commands", "--json"])
        .expect(5)
        .json();
    assert!(
        j["differences"]
            .as_array()
            .unwrap()
            .iter()
            .any(|x| x["metric"] == "input model.py"),
        "{j}"
    );
}

#[test]
fn failures_are_recorded_and_the_others_go_on() {
    let cases: [(&str, &str, &str, &str); 5] = [
        (
            "cmd-exit",
            "import sys\nsys.stderr.write('no convergence here\\n')\nsys.exit(7)\n",
            "",
            "exit status 7; stderr: no convergence here",
        ),
        (
            "cmd-timeout",
            "import time\ntime.sleep(30)\n",
            "timeout = 1",
            "timed out after 1 s",
        ),
        (
            "cmd-nan",
            "import os\nopen(os.environ['PROBITY_OUT'], 'w').write('prediction\\n' + 'nan\\n' * 100)\n",
            "",
            "not a finite number",
        ),
        (
            "cmd-rows",
            "import os\nopen(os.environ['PROBITY_OUT'], 'w').write('prediction\\n1.0\\n')\n",
            "",
            "prediction rows for",
        ),
        ("cmd-none", "pass\n", "", "wrote no predictions file"),
    ];
    for (name, script, extra, fragment) in cases {
        let d = setup(name, script, extra);
        let j = d.probity(&["run", "c.toml", "--json"]).expect(0).json();
        let failed: Vec<&serde_json::Value> = j["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|c| c["model"] == "command")
            .collect();
        assert_eq!(failed.len(), 2);
        for c in failed {
            let f = c["failure"]
                .as_str()
                .unwrap_or_else(|| panic!("{name}: no failure recorded: {c}"));
            assert!(f.contains(fragment), "{name}: {f}");
            assert!(c["validation"]["rmse"].is_null());
        }
        assert_ne!(
            j["candidates"][j["selected"].as_i64().unwrap() as usize - 1]["model"],
            "command"
        );
        assert!(
            j["warnings"]
                .as_array()
                .unwrap()
                .iter()
                .any(|w| w.as_str().unwrap().contains("failed on fold")),
            "{name}"
        );
        let s = d.probity(&["show", "1"]).expect(0).stdout();
        assert!(s.contains("failed"), "{s}");
    }
}

/// A command that ignores the seed (draws from the operating system) is caught by replay,
/// which names the candidate.
#[test]
fn a_nondeterministic_command_is_caught_by_replay() {
    let noisy = MEAN_MODEL.replace(
        "+ json.loads(",
        "+ int.from_bytes(os.urandom(4), 'little') * 1e-9 + json.loads(",
    );
    let d = setup("cmd-noise", &noisy, "");
    d.probity(&["run", "c.toml"]).expect(0);
    let j = d
        .probity(&["replay", "1", "--allow-commands", "--json"])
        .expect(5)
        .json();
    let diffs = j["differences"].as_array().unwrap();
    assert!(
        diffs
            .iter()
            .any(|x| x["candidate"].as_i64().is_some_and(|c| c >= 7)),
        "{j}"
    );
}

#[test]
fn command_specs_are_checked() {
    let d = small_dir("cmd-spec");
    d.write(
        "a.toml",
        &format!("{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nparams = {{ a = [1] }}\n"),
    );
    let r = d.probity(&["run", "a.toml"]).expect(2);
    assert!(r.stderr().contains("needs run = ["), "{}", r.stderr());
    d.write("b.toml", &format!("{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nrun = [\"python3\", \"m.py\"]\ninputs = [\"m.py\"]\n"));
    let r = d.probity(&["run", "b.toml"]).expect(2);
    assert!(
        r.stderr().contains("input ") && r.stderr().contains("does not exist"),
        "{}",
        r.stderr()
    );
    d.write(
        "c.toml",
        &format!(
            "{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nrun = [\"python3\"]\nlambda = [1]\n"
        ),
    );
    let r = d.probity(&["run", "c.toml"]).expect(2);
    assert!(
        r.stderr()
            .contains("put the command's parameters in params"),
        "{}",
        r.stderr()
    );
}

/// A classifier as a command: class shares as probabilities, checked against the built-in prior
/// baseline; and probabilities that do not sum to one are refused.
#[test]
fn a_command_classifier_writes_class_probabilities() {
    let prior = r#"
import csv, json, os
fit = list(csv.reader(open(os.environ["PROBITY_FIT"])))
score = list(csv.reader(open(os.environ["PROBITY_SCORE"])))
classes = json.loads(os.environ["PROBITY_CLASSES"])
t = fit[0].index(os.environ["PROBITY_TARGET"])
counts = [sum(1 for r in fit[1:] if r[t] == c) for c in classes]
p = [c / (len(fit) - 1) for c in counts]
scale = json.loads(os.environ["PROBITY_PARAMS"])["scale"]
with open(os.environ["PROBITY_OUT"], "w") as f:
    f.write("prediction," + ",".join("p_" + c for c in classes) + "\n")
    for _ in score[1:]:
        f.write(classes[p.index(max(p))] + "," + ",".join(repr(v * scale) for v in p) + "\n")
"#;
    let d = Dir::new("cmd-class");
    let ex = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("experiments");
    d.copy(&ex.join("bays.csv"), "bays.csv");
    d.write("prior.py", prior);
    let spec = std::fs::read_to_string(ex.join("outbreak.toml"))
        .unwrap()
        .split("[[model]]")
        .next()
        .unwrap()
        .to_string()
        + "[[model]]\nkind = \"command\"\nrun = [\"python3\", \"prior.py\"]\nparams = { scale = [1.0, 0.5] }\n";
    // Undeclared, the script is outside the command's box: refused before anything runs.
    d.write("o.toml", &spec);
    let r = d.probity(&["check", "o.toml"]).expect(2);
    assert!(
        r.stderr().contains("o.toml:") && r.stderr().contains("list it in inputs = [\"prior.py\"]"),
        "{}",
        r.stderr()
    );
    d.write("o.toml", &(spec + "inputs = [\"prior.py\"]\n"));
    let j = d.probity(&["run", "o.toml", "--json"]).expect(0).json();
    let c = j["candidates"].as_array().unwrap();
    let ok = c.iter().find(|x| x["params"]["scale"] == 1.0).unwrap();
    assert_eq!(ok["validation"]["accuracy"], c[0]["validation"]["accuracy"]);
    assert!(
        (ok["validation"]["log_loss"].as_f64().unwrap()
            - c[0]["validation"]["log_loss"].as_f64().unwrap())
        .abs()
            < 1e-12
    );
    let bad = c.iter().find(|x| x["params"]["scale"] == 0.5).unwrap();
    assert!(bad["failure"].as_str().unwrap().contains("sum to"), "{bad}");
}

/// A command family runs again (reveal, predict) without a flag only for the user's own run
/// with its inputs unchanged. After an input changed, or in a run merged from another ledger,
/// it runs only with `--allow-commands`, which lists the command and its inputs' hashes first;
/// a refusal records nothing.
#[test]
fn merged_or_changed_commands_run_only_with_consent() {
    let alice = setup("consent-alice", MEAN_MODEL, "");
    let j = alice.probity(&["run", "c.toml", "--json"]).expect(0).json();
    let id = shift_zero(&j);
    alice.public_key("alice");
    alice.probity(&["pack", "1", "--out", "a.json"]).expect(0);
    alice
        .probity(&["reveal", "1", "--candidate", &id, "--yes"])
        .expect(0);
    // The model file edited since the run.
    alice.write("model.py", &format!("{MEAN_MODEL}\n# edited\n"));
    let before = alice.counts();
    for args in [
        vec!["reveal", "1", "--candidate", &id, "--yes"],
        vec![
            "predict",
            "1",
            "--candidate",
            &id,
            "--input",
            "small.csv",
            "--output",
            "p.csv",
        ],
    ] {
        let r = alice.probity(&args).expect(2);
        assert!(
            r.stderr()
                .contains("has command inputs that changed since it ran")
                && r.stderr().contains("--allow-commands"),
            "{}",
            r.stderr()
        );
    }
    assert_eq!(alice.counts(), before);
    let r = alice
        .probity(&[
            "reveal",
            "1",
            "--candidate",
            &id,
            "--yes",
            "--allow-commands",
        ])
        .expect(0);
    assert!(
        r.stderr().contains("running the command of run 1")
            && r.stderr().contains("input model.py: SHA-256"),
        "{}",
        r.stderr()
    );
    // Bob merges Alice's run: its command came from another ledger.
    let bob = small_dir("consent-bob");
    bob.trusts(&alice, "alice");
    std::fs::copy(alice.path.join("a.json"), bob.path.join("a.json")).unwrap();
    bob.probity(&["merge", "a.json"]).expect(0);
    let before = bob.counts();
    let r = bob
        .probity(&["reveal", "1", "--candidate", &id, "--yes"])
        .expect(2);
    assert!(
        r.stderr().contains("came from another ledger") && r.stderr().contains("python3"),
        "{}",
        r.stderr()
    );
    assert_eq!(bob.counts(), before);
    // A built-in candidate of the same merged run needs no consent.
    bob.probity(&["reveal", "1", "--yes"]).expect(0);
    // A replay the user agreed to repeats the merged run; its command still needs consent.
    // (Alice's model file changed since her run: the replay differs, exit 5, and is stored.)
    bob.probity(&["replay", "1", "--allow-commands"]).expect(5);
    let r = bob
        .probity(&["reveal", "2", "--candidate", &id, "--yes"])
        .expect(2);
    assert!(
        r.stderr().contains("came from another ledger"),
        "{}",
        r.stderr()
    );
}

/// What a command tries from inside: the data file by absolute and relative path and through
/// the parent's `/proc` entry, the ledger, a file written beside the spec, the descriptors it
/// was given, and whether the cells it was handed are as written (two decimals each). It
/// always fails, so that its findings come back in the run's failure message.
const PROBE: &str = r#"
import csv, json, os, sys
p = json.loads(os.environ["PROBITY_PARAMS"])
here = p["dir"]
out = []
def tryread(label, path):
    try:
        with open(path, "rb") as f:
            f.read(1)
        out.append(label + "=read")
    except OSError:
        out.append(label + "=denied")
tryread("abs", here + "/small.csv")
tryread("rel", "small.csv")
tryread("proc", "/proc/%d/cwd/small.csv" % os.getppid())
tryread("ledger", here + "/.probity/ledger.sqlite")
tryread("input", sys.argv[0])
try:
    with open(here + "/side.txt", "w") as f:
        f.write("x")
    out.append("write=done")
except OSError:
    out.append("write=denied")
def trycall(label, call):
    try:
        call()
        out.append(label + "=done")
    except OSError:
        out.append(label + "=denied")
data = here + "/small.csv"
st = os.stat(data)
trycall("chmod", lambda: os.chmod(data, st.st_mode & 0o7777))
trycall("utime", lambda: os.utime(data, ns=(st.st_atime_ns, st.st_mtime_ns)))
trycall("mknod", lambda: os.mknod("node", 0o20600, os.makedev(1, 3)))
import socket
trycall("net", lambda: socket.socket(socket.AF_INET, socket.SOCK_STREAM).close())
trycall("unix", lambda: socket.socket(socket.AF_UNIX, socket.SOCK_STREAM).close())
trycall("tty", lambda: open("/dev/tty", "rb").close())
caps = [l.split()[1] for l in open("/proc/self/status") if l.startswith("CapEff:")][0]
out.append("caps=" + caps)
import subprocess
left = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"], start_new_session=True)
out.append("left=%d" % left.pid)
fds = sorted(int(x) for x in os.listdir("/proc/self/fd"))
out.append("fds=" + ",".join(str(x) for x in fds))
cells = []
for name in ("PROBITY_FIT", "PROBITY_SCORE"):
    rows = list(csv.reader(open(os.environ[name])))
    j = rows[0].index("x1")
    cells += [r[j] for r in rows[1:]]
ok = all(len(c.split(".")[1]) == 2 for c in cells)
out.append("cells=" + ("as-written" if ok else "rewritten:" + cells[0]))
sys.exit("probe: " + " ".join(out))
"#;

/// The id of the command candidate with `shift = 0`, from `run --json`.
fn shift_zero(j: &serde_json::Value) -> String {
    j["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["model"] == "command" && c["params"]["shift"] == 0.0)
        .unwrap()["id"]
        .as_i64()
        .unwrap()
        .to_string()
}

/// Why a run's (first) command candidate failed, from `run --json` or `show --json`.
fn command_failure(j: &serde_json::Value) -> String {
    j["candidates"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["model"] == "command")
        .unwrap()["failure"]
        .as_str()
        .unwrap()
        .to_string()
}

/// The probe's findings from a run of `spec` in `d`.
fn probe(d: &Dir, spec: &str) -> (String, Vec<String>) {
    d.write("probe.toml", spec);
    let j = d.probity(&["run", "probe.toml", "--json"]).expect(0).json();
    let failure = command_failure(&j);
    let warnings = j["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|w| w.as_str().unwrap().to_string())
        .collect();
    (failure, warnings)
}

/// A boxed command reads its inputs and scratch files and nothing else of the user's: the data
/// file (absolute, relative, or through /proc), the ledger and the spec's folder are closed to
/// it, it writes nowhere else, it changes no file's mode or times, makes no device file, opens
/// no socket and no terminal, holds no descriptor beyond 0-2 (and the one listing them), its
/// files keep the data file's cells byte for byte, and what it leaves running ends with it. The same probe with
/// `sandbox = false` reads the data file and writes beside the spec, so the probe can see a
/// leak when there is one; that run carries a warning, and the spec hash records the choice.
#[test]
fn a_boxed_command_cannot_reach_the_data_file_or_the_ledger() {
    let d = small_dir("cmd-box");
    let csv: String = crate::fixtures::small_csv()
        .lines()
        .enumerate()
        .map(|(i, l)| {
            if i == 0 {
                return format!("{l}\n");
            }
            let mut f: Vec<String> = l.split(',').map(str::to_string).collect();
            f[1] = format!("{:.2}", f[1].parse::<f64>().unwrap());
            f.join(",") + "\n"
        })
        .collect();
    d.write("small.csv", &csv);
    d.probity(&["run", "small.toml"]).expect(0); // the ledger exists
    d.write("probe.py", PROBE);
    let here = std::fs::canonicalize(&d.path).unwrap();
    let spec = |extra: &str| {
        format!(
            "{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nrun = [\"python3\", \"probe.py\"]\nparams = {{ dir = [\"{}\"] }}\ninputs = [\"probe.py\"]\n{extra}",
            here.display()
        )
    };
    // What a command leaves running after leaving its group (a session of its own) ends
    // with it: boxed or not.
    let gone = |found: &str| {
        let pid = found
            .split_whitespace()
            .find_map(|w| w.strip_prefix("left="))
            .unwrap();
        let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).unwrap_or_default();
        assert!(
            stat.is_empty() || stat.contains(") Z "),
            "process {pid} outlived its command: {stat}"
        );
    };
    let (boxed, warnings) = probe(&d, &spec(""));
    assert!(
        boxed.contains(
            "probe: abs=denied rel=denied proc=denied ledger=denied input=read write=denied chmod=denied utime=denied mknod=denied net=denied unix=denied tty=denied caps=0000000000000000 left="
        ) && boxed.contains(" fds=0,1,2,3 cells=as-written"),
        "{boxed}"
    );
    gone(&boxed);
    assert!(!here.join("side.txt").exists());
    assert!(
        !warnings.iter().any(|w| w.contains("outside the box")),
        "{warnings:?}"
    );
    let (open, warnings) = probe(&d, &spec("sandbox = false\n"));
    assert!(
        open.contains("abs=read")
            && open.contains("ledger=read")
            && open.contains("write=done")
            && open.contains("chmod=done")
            && open.contains("net=done"),
        "{open}"
    );
    gone(&open);
    assert!(
        warnings
            .iter()
            .any(|w| w.contains("ran outside the box (sandbox = false)")),
        "{warnings:?}"
    );
    let hash = |run: &str| {
        d.probity(&["show", run, "--json"]).expect(0).json()["spec"]["sha256"]
            .as_str()
            .unwrap()
            .to_string()
    };
    assert_ne!(
        hash("2"),
        hash("3"),
        "sandbox = false changes the spec hash"
    );
    // Merged elsewhere, the unboxed run's command is boxed all the same when replayed there.
    d.public_key("alice");
    d.probity(&["pack", "3", "--out", "u.json"]).expect(0);
    let bob = Dir::new("cmd-box-bob");
    bob.trusts(&d, "alice");
    bob.copy(&d.path.join("u.json"), "u.json");
    bob.probity(&["merge", "u.json"]).expect(0);
    let data = here.join("small.csv");
    let r = bob.probity(&[
        "replay",
        "1",
        "--allow-commands",
        "--data",
        data.to_str().unwrap(),
    ]);
    assert!(
        r.stderr().contains("replay will run") && !r.stderr().contains("outside the box"),
        "{}",
        r.stderr()
    );
    let replayed = bob.probity(&["show", "2", "--json"]).expect(0).json();
    let failure = command_failure(&replayed);
    assert!(
        failure.contains("abs=denied") && failure.contains("write=denied"),
        "{failure}"
    );
}

/// Inputs are checked against the box: one that is (or holds) the data file is refused, and a
/// folder input is readable whole and fingerprinted by its contents.
#[test]
fn inputs_cannot_open_the_box_to_the_data() {
    let d = small_dir("cmd-box-inputs");
    for (input, word) in [
        ("small.csv", "is the data file"),
        (".", "holds the data file"),
    ] {
        d.write(
            "i.toml",
            &format!(
                "{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nrun = [\"python3\", \"-c\", \"pass\"]\ninputs = [\"{input}\"]\n"
            ),
        );
        let r = d.probity(&["check", "i.toml"]).expect(2);
        assert!(
            r.stderr().contains("i.toml:") && r.stderr().contains(word),
            "{input}: {}",
            r.stderr()
        );
    }
    // The data file under another name (a hard link) in a folder input; a pipe in one (its
    // hash would wait for ever); a folder of the kernel's.
    std::fs::create_dir_all(d.path.join("helper")).unwrap();
    std::fs::hard_link(d.path.join("small.csv"), d.path.join("helper/copy.csv")).unwrap();
    std::fs::create_dir_all(d.path.join("piped")).unwrap();
    assert!(
        std::process::Command::new("mkfifo")
            .arg(d.path.join("piped/p"))
            .status()
            .unwrap()
            .success()
    );
    for (input, word) in [
        ("helper", "the data file under another name (a hard link)"),
        ("helper/copy.csv", "a hard link"),
        ("piped", "a named pipe"),
        ("/proc", "a folder of the kernel's"),
    ] {
        d.write(
            "i.toml",
            &format!(
                "{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nrun = [\"python3\", \"-c\", \"pass\"]\ninputs = [\"{input}\"]\n"
            ),
        );
        let r = d.probity_within(&["check", "i.toml"], 60).expect(2);
        assert!(
            r.stderr().contains("i.toml:") && r.stderr().contains(word),
            "{input}: {}",
            r.stderr()
        );
    }
    // Another name of the data file anywhere is worth a warning in a run with a boxed command.
    std::fs::remove_dir_all(d.path.join("piped")).unwrap();
    d.write("m.py", MEAN_MODEL);
    d.write("m.toml", &command_spec("m.py", ""));
    let j = d.probity(&["run", "m.toml", "--json"]).expect(0).json();
    assert!(
        j["warnings"]
            .as_array()
            .unwrap()
            .iter()
            .any(|w| w.as_str().unwrap().contains("has 2 names (hard links)")),
        "{}",
        j["warnings"]
    );
}

/// What a command leaves in its scratch folder is read back safely: a stderr file replaced by
/// a link to the data file (its stderr is kept elsewhere), a predictions file that is a link;
/// a program named by path in a folder of its own gets that folder no wider than itself; and
/// what it starts in the background ends with it.
#[test]
fn a_command_cannot_make_probity_read_for_it() {
    let d = small_dir("cmd-box-readback");
    let here = std::fs::canonicalize(&d.path).unwrap();
    std::fs::create_dir_all(d.path.join("tools")).unwrap();
    d.write("tools/notes.txt", "undeclared secret\n");
    d.write(
        "tools/fit.sh",
        &format!(
            r#"#!/bin/sh
case "$PROBITY_PARAMS" in
*probe*)
  sleep 300 &
  if cat "$(dirname "$0")/notes.txt" >/dev/null 2>&1; then n=read; else n=denied; fi
  echo "probe: pid=$! notes=$n" >&2
  exit 1;;
esac
ln -sf {data} stderr.txt
ln -sf {data} "$PROBITY_OUT"
exit 0
"#,
            data = here.join("small.csv").display()
        ),
    );
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        std::fs::set_permissions(
            d.path.join("tools/fit.sh"),
            std::fs::Permissions::from_mode(0o755),
        )
        .unwrap();
    }
    d.write(
        "t.toml",
        &format!(
            "{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nrun = [\"tools/fit.sh\"]\ninputs = [\"tools/fit.sh\"]\nparams = {{ mode = [\"link\", \"probe\"] }}\n"
        ),
    );
    let j = d.probity(&["run", "t.toml", "--json"]).expect(0).json();
    let failure = |mode: &str| {
        j["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["model"] == "command" && c["params"]["mode"] == mode)
            .unwrap()["failure"]
            .as_str()
            .unwrap()
            .to_string()
    };
    let link = failure("link");
    assert!(
        link.contains("not a plain file") && !link.contains("r1,") && !link.contains("x1"),
        "{link}"
    );
    let probe = failure("probe");
    assert!(probe.contains("notes=denied"), "{probe}");
    let pid: u32 = probe
        .split("pid=")
        .nth(1)
        .unwrap()
        .split_whitespace()
        .next()
        .unwrap()
        .parse()
        .unwrap();
    assert!(
        !std::path::Path::new(&format!("/proc/{pid}")).exists()
            || std::fs::read_to_string(format!("/proc/{pid}/stat"))
                .is_ok_and(|s| s.contains(") Z")),
        "the background sleep {pid} outlived its command"
    );
    // The stored warnings and failures hold nothing of the data file.
    let shown = d.probity(&["show", "1", "--json"]).expect(0).stdout();
    assert!(!shown.contains("shade,bay"), "{shown}");
}

/// A stand-in for an older kernel, loaded with LD_PRELOAD: Landlock's version query answers
/// `ABI` (0: no Landlock, as ENOSYS); every other system call goes through.
const OLD_KERNEL: &str = r#"
#define _GNU_SOURCE
#include <dlfcn.h>
#include <errno.h>
#include <stdarg.h>
#include <sys/syscall.h>
long syscall(long n, ...) {
    va_list ap;
    va_start(ap, n);
    long a[6];
    for (int i = 0; i < 6; i++) a[i] = va_arg(ap, long);
    va_end(ap);
    if (n == SYS_landlock_create_ruleset && a[2] == 1) {
        if (ABI == 0) { errno = ENOSYS; return -1; }
        return ABI;
    }
    if (n == SYS_landlock_create_ruleset && ABI == 0) { errno = ENOSYS; return -1; }
    long (*real)(long, ...) = (long (*)(long, ...))dlsym(RTLD_NEXT, "syscall");
    return real(n, a[0], a[1], a[2], a[3], a[4], a[5]);
}
"#;

/// The shim for `abi`, built with the C compiler in `d` (gcc is on every machine this runs on).
fn old_kernel(d: &Dir, abi: u32) -> String {
    let src = d.write(&format!("abi{abi}.c"), OLD_KERNEL);
    let lib = d.path.join(format!("abi{abi}.so"));
    let ok = std::process::Command::new("cc")
        .args(["-shared", "-fPIC", "-O2", &format!("-DABI={abi}"), "-o"])
        .arg(&lib)
        .arg(&src)
        .arg("-ldl")
        .status()
        .unwrap()
        .success();
    assert!(ok, "cannot build the shim");
    lib.display().to_string()
}

/// Where the box would not hold (no Landlock, or one too old to stop truncation), a run
/// stores a warning saying so, and a reveal or prediction that would run a command meant for
/// the box refuses without --allow-commands, then warns.
#[test]
fn a_box_that_would_not_hold_is_warned_and_needs_consent() {
    let d = setup("cmd-gap", MEAN_MODEL, "");
    let j = d.probity(&["run", "c.toml", "--json"]).expect(0).json();
    let id = shift_zero(&j);
    assert!(
        !j["warnings"].to_string().contains("box"),
        "{}",
        j["warnings"]
    );
    for (abi, why) in [
        (0, "has no Landlock"),
        (2, "cannot stop a command from truncating"),
    ] {
        let shim = old_kernel(&d, abi);
        let env = [("LD_PRELOAD", shim.as_str())];
        let j = d
            .probity_env(&["run", "c.toml", "--json"], &env)
            .expect(0)
            .json();
        let w = j["warnings"].to_string();
        assert!(
            w.contains("ran outside a box that holds") && w.contains(why),
            "ABI {abi}: {w}"
        );
        let before = d.counts();
        for args in [
            vec!["reveal", "1", "--candidate", &id, "--yes"],
            vec![
                "predict",
                "1",
                "--candidate",
                &id,
                "--input",
                "small.csv",
                "--output",
                "p.csv",
            ],
        ] {
            let r = d.probity_env(&args, &env).expect(2);
            assert!(
                r.stderr().contains("which would not hold here") && r.stderr().contains(why),
                "{}",
                r.stderr()
            );
        }
        assert_eq!(d.counts(), before, "a refused reveal records nothing");
    }
    let shim = old_kernel(&d, 0);
    let r = d
        .probity_env(
            &[
                "reveal",
                "1",
                "--candidate",
                &id,
                "--yes",
                "--allow-commands",
            ],
            &[("LD_PRELOAD", shim.as_str())],
        )
        .expect(0);
    assert!(
        r.stderr().contains("running the command of run 1")
            && r.stderr().contains("has no Landlock"),
        "{}",
        r.stderr()
    );
}

/// A command whose helper leaves its group (a session of its own) and which waits for that
/// helper works alike on 1 thread and on 4: a helper is ended only once no command of the run
/// is running, never while another command finishes.
#[test]
fn a_commands_own_helper_survives_other_commands_ending() {
    let helper = r#"
import os, sys, time, json
k = json.loads(os.environ["PROBITY_PARAMS"])["shift"]
flag = os.path.join(os.environ["TMPDIR"], "flag")
pid = os.fork()
if pid == 0:
    if os.fork() == 0:
        os.setsid()
        time.sleep(0.05 + 0.1 * k)
        open(flag, "w").write("x")
    os._exit(0)
os.waitpid(pid, 0)
for _ in range(1000):
    if os.path.exists(flag):
        break
    time.sleep(0.01)
else:
    sys.exit("helper vanished")
"#;
    let d = small_dir("cmd-helper");
    d.write("model.py", &format!("{helper}\n{MEAN_MODEL}"));
    d.write(
        "c.toml",
        &format!(
            "{SMALL_SPEC}\n[[model]]\nkind = \"command\"\nrun = [\"python3\", \"model.py\"]\nparams = {{ shift = [0.0, 0.5, 1.0, 1.5, 2.0, 2.5] }}\ninputs = [\"model.py\"]\n"
        ),
    );
    for threads in ["1", "4"] {
        let j = d
            .probity(&["run", "c.toml", "--threads", threads, "--json"])
            .expect(0)
            .json();
        let failed: Vec<String> = j["candidates"]
            .as_array()
            .unwrap()
            .iter()
            .filter(|c| !c["failure"].is_null())
            .map(|c| c["failure"].to_string())
            .collect();
        assert!(failed.is_empty(), "{threads} thread(s): {failed:?}");
    }
}
