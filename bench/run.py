#!/usr/bin/env python3
"""Benchmark probity against the peer Python stack (../shared/bench), on the same generated files.

A benchmark, not a test: it prints figures and is never part of CI. Scenarios (issue 7):
  a  1,000,000 x 20 regression, ridge with 50 log-spaced penalties, 5 folds, CSV to stored ledger
     peer: its CSV load (stage a) plus its per-fold Gram grid (stage c2), the "expert numpy" anchor
  b  50,000 x 20 kNN regression, k in {1,2,3,5,8,13,21,30}, 5 folds
     peer: stage d2 (one 30-neighbour query per fold)
  c  200,000 x 20 binary logistic, 10 penalties, 5 folds
     peer: stage e (logistic GridSearchCV)
  d  a ledger write of 10,000 candidates (a 10,000-point ridge grid on 1,000 rows, 2 folds)

probity and the peer run alternately, REPEATS times each; the table gives medians, the ratio, and
probity's peak memory (/usr/bin/time -v, maximum resident set size). Before every timed run of
either side, the data file is read once, untimed (--no-warm turns this off): on a shared machine
the kernel may evict the file's pages between runs, and a run that re-reads them from disk
measures the disk, not the program (one such run here took 25 s instead of 1.5 s).

"total/load" is given twice: the median run's time over the median load, and the median of each
run's time over its own load (the pair saw the same state of a shared machine). The load phase
reads, parses and hashes the file (SHA-256, on a thread of its own: each block is hashed while
the next one is read). "total/parse" divides by the parse alone: in each repeat, right after
the run, `PROBITY_TIMINGS=parse-only probity run` reads and parses the same file with the same
reader, without the hash, and stops (issue 7's "time to merely parse the CSV"). It too is given
over the medians and run by run.

Usage:
  python3 bench/run.py [--repeats 3] [--data DIR] [--scenarios a,b,c,d]
Needs: numpy, pandas, scikit-learn, scipy, threadpoolctl (for the peer and the data generator),
and /usr/bin/time. Data files (about 0.5 GB) go to --data (default: a temporary folder).
"""

import argparse
import json
import os
import re
import statistics
import subprocess
import sys
import tempfile

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SHARED = os.environ.get("SHARED_BENCH", os.path.join(ROOT, "..", "shared", "bench"))
PEER_ENV = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")}


def sh(cmd, **kw):
    return subprocess.run(cmd, check=True, **kw)


def data(dir_):
    files = {
        "reg": os.path.join(dir_, "reg_1m_20.csv"),
        "bin": os.path.join(dir_, "bin_200k_20.csv"),
    }
    gen = os.path.join(SHARED, "make_data.py")
    if not os.path.exists(files["reg"]):
        sh([sys.executable, gen, "--rows", "1000000", "--features", "20", "--task", "regression", "--out", files["reg"]])
    if not os.path.exists(files["bin"]):
        sh([sys.executable, gen, "--rows", "200000", "--features", "20", "--task", "binary", "--out", files["bin"]])
    # The generator writes blocks from per-block seeds, so a prefix is a smaller data set.
    small = os.path.join(dir_, "reg_50k_20.csv")
    if not os.path.exists(small):
        with open(files["reg"]) as src, open(small, "w") as dst:
            for i, line in enumerate(src):
                if i > 50000:
                    break
                dst.write(line)
    files["knn"] = small
    tiny = os.path.join(dir_, "reg_1k_20.csv")
    if not os.path.exists(tiny):
        with open(files["reg"]) as src, open(tiny, "w") as dst:
            for i, line in enumerate(src):
                if i > 1000:
                    break
                dst.write(line)
    files["tiny"] = tiny
    return files


def spec(name, path, task, models, folds=5):
    return f"""name = "{name}"
task = "{task}"
[data]
path = "{path}"
target = "y"
ignore = ["part"]
[split]
method = "random"
seed = 1
test = 0.2
folds = {folds}
{models}
"""


SPECS = {
    "a": ("reg", "regression", '[[model]]\nkind = "ridge"\nlambda = { from = 0.001, to = 1000, steps = 50, scale = "log" }\n', 5),
    "b": ("knn", "regression", '[[model]]\nkind = "knn"\nk = [1, 2, 3, 5, 8, 13, 21, 30]\n', 5),
    "c": ("bin", "classification", '[[model]]\nkind = "logistic"\nlambda = { from = 0.01, to = 1000, steps = 10, scale = "log" }\n', 5),
    "d": ("tiny", "regression", '[[model]]\nkind = "ridge"\nlambda = { from = 0.001, to = 1000, steps = 9999, scale = "log" }\n', 2),
}
PEER = {"a": ["a", "c2"], "b": ["d2"], "c": ["e"], "d": []}


def warm(path):
    """Read `path` once, so the timed run finds it in the page cache."""
    with open(path, "rb") as f:
        while f.read(1 << 24):
            pass


def run_probity(binary, spec_path, ledger):
    if os.path.exists(ledger):
        os.remove(ledger)
    env = dict(os.environ, PROBITY_TIMINGS="1")
    out = subprocess.run(["/usr/bin/time", "-v", binary, "run", spec_path, "--ledger", ledger, "--json"], capture_output=True, text=True, env=env)
    if out.returncode != 0:
        raise SystemExit(f"probity failed: {out.stderr[-2000:]}")
    wall = rss = load = None
    stored = 0.0
    for line in out.stderr.splitlines():
        line = line.strip()
        # PROBITY_TIMINGS: the load phase (read, parse, hash) is the parse floor of the same run;
        # load + run + exposure + ledger is the time until the run is committed.
        m = re.match(r"timing ([a-z ]+): ([0-9.]+) s", line)
        if m and m.group(1) == "load":
            load = float(m.group(2))
        if m and m.group(1) in ("load", "run", "exposure", "ledger"):
            stored += float(m.group(2))
        if line.startswith("Elapsed (wall clock) time"):
            t = line.rsplit(" ", 1)[1].split(":")
            wall = sum(float(x) * 60 ** i for i, x in enumerate(reversed(t)))
        if line.startswith("Maximum resident set size"):
            rss = int(line.rsplit(" ", 1)[1]) / 1024
    return wall, rss, load, stored


def run_parse_only(binary, spec_path):
    """The parse floor: probity's reader on the same file, without the hash; nothing stored."""
    env = dict(os.environ, PROBITY_TIMINGS="parse-only")
    out = subprocess.run([binary, "run", spec_path], capture_output=True, text=True, env=env)
    if out.returncode != 0:
        raise SystemExit(f"probity (parse only) failed: {out.stderr[-2000:]}")
    m = re.search(r"timing parse: ([0-9.]+) s", out.stderr)
    if not m:
        raise SystemExit(f"probity (parse only) printed no parse time: {out.stderr[-2000:]}")
    return float(m.group(1))


def run_peer(files, stages, repeats_json):
    if not stages:
        return {}
    cmd = [sys.executable, os.path.join(SHARED, "peer_grid.py"), "--data", files["reg"], "--binary", files["bin"], "--repeats", "1", "--stages", ",".join(stages), "--json", repeats_json]
    sh(cmd, env=PEER_ENV, capture_output=True)
    with open(repeats_json) as f:
        return {s: v["median_s"] for s, v in json.load(f)["stages"].items()}


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--data", default=os.path.join(tempfile.gettempdir(), "probity-bench"))
    ap.add_argument("--scenarios", default="a,b,c,d")
    ap.add_argument("--no-warm", action="store_true", help="do not read the data file before each timed run")
    args = ap.parse_args()
    os.makedirs(args.data, exist_ok=True)
    sh(["cargo", "build", "--release", "--quiet", "--manifest-path", os.path.join(ROOT, "Cargo.toml")])
    binary = os.path.join(ROOT, "target", "release", "probity")
    files = data(args.data)
    rows = []
    for sc in args.scenarios.split(","):
        key, task, models, folds = SPECS[sc]
        spec_path = os.path.join(args.data, f"bench-{sc}.toml")
        with open(spec_path, "w") as f:
            f.write(spec(f"bench-{sc}", files[key], task, models, folds))
        ledger = os.path.join(args.data, f"bench-{sc}.sqlite")
        ours, rss, peer, loads, stores, parses = [], [], [], [], [], []
        # The peer script always loads the regression file; stage e reads the binary one too.
        peer_files = [files["reg"]] + ([files["bin"]] if "e" in PEER[sc] else [])
        for _ in range(args.repeats):
            if not args.no_warm:
                warm(files[key])
            w, m, ld, st = run_probity(binary, spec_path, ledger)
            ours.append(w)
            rss.append(m)
            loads.append(ld)
            stores.append(st)
            if not args.no_warm:
                warm(files[key])
            parses.append(run_parse_only(binary, spec_path))
            if not args.no_warm:
                for f in peer_files:
                    warm(f)
            p = run_peer(files, PEER[sc], os.path.join(args.data, "peer.json"))
            if p:
                peer.append(sum(p.values()))
        o = statistics.median(ours)
        q = statistics.median(peer) if peer else None
        rows.append((sc, o, q, max(rss)))
        ld = statistics.median(loads)
        # Each run against its own load as well: both halves of a pair saw the same machine.
        paired = [w / l for w, l in zip(ours, loads)]
        pa = statistics.median(parses)
        per_parse = [w / x for w, x in zip(ours, parses)]
        print(f"{sc}: probity {o:.3f} s (runs {', '.join(f'{x:.3f}' for x in ours)}), peak {max(rss):.0f} MiB; "
              + f"load (read+parse+hash) {ld:.3f} s (runs {', '.join(f'{x:.3f}' for x in loads)}), total/load {o / ld:.2f} "
              + f"(per run {', '.join(f'{x:.2f}' for x in paired)}: median {statistics.median(paired):.2f}); "
              + f"parse alone {pa:.3f} s (runs {', '.join(f'{x:.3f}' for x in parses)}), total/parse {o / pa:.2f} "
              + f"(per run {', '.join(f'{x:.2f}' for x in per_parse)}: median {statistics.median(per_parse):.2f}), "
              + f"committed after {statistics.median(stores):.3f} s; "
              + (f"peer {'+'.join(PEER[sc])} {q:.3f} s, ratio {o / q:.2f}" if q else "no peer stage"), flush=True)
    print("\nscenario  probity_s  peer_s  ratio  probity_peak_MiB")
    for sc, o, q, m in rows:
        print(f"{sc:8}  {o:9.3f}  {q if q is None else round(q, 3)!s:>6}  {('-' if q is None else f'{o / q:.2f}'):>5}  {m:16.0f}")


if __name__ == "__main__":
    main()
