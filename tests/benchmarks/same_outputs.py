"""Whether two versions of the code write the same files: run a fixed set of commands, then compare.

Used when code is moved without meaning to change what it computes (a new package layout, a
function split into steps): record the outputs of the old code, run the new code the same way and
compare every file. Not a test of ``make test`` (it runs the demo, a screening and a backtest:
a few minutes)::

    python tests/benchmarks/same_outputs.py run --code OLD_CHECKOUT --module training.cli --dest /tmp/before
    python tests/benchmarks/same_outputs.py run --code . --dest /tmp/after
    python tests/benchmarks/same_outputs.py compare /tmp/before /tmp/after

``run`` copies the demo tiles and the model of ``--code`` into one fixed scratch folder and writes
every output under it, whatever the checkout, so that absolute paths written into the outputs are
the same in both runs; the finished folder is then moved to ``--dest``. ``compare`` calls two files
the same when their bytes are (sha256), and otherwise only when they agree after removing the
fields that record when or how fast a run went (listed in :data:`VOLATILE_KEYS` and
:data:`VOLATILE_LINES`; GeoPackages are compared table by table without their ``last_change``
stamps; printed output with the checkout's own path, where the demo shows the studies recorded
in its docs/, read as ``<checkout>``). It prints one line per file that is not byte-identical and exits 1 when any file differs.
"""

import argparse
import hashlib
import json
import os
import re
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

SCRATCH = Path("/tmp/frostvane_same_outputs")

#: The commands, as argument lists of the ``frostvane`` entry point ({data}: the copied demo data,
#: {out}: the output folder). The demo covers validate, evaluate, screen (a GeoTIFF), effort, next
#: tiles and winds; the others add a tile-set screening and a backtest.
COMMANDS = {
    "demo": ["demo", "--out", "{out}/demo", "--tiles", "{data}/demo_tiles", "--model", "{data}/models/demo"],
    "validate": ["validate", "{data}/demo_tiles"],
    "screen_tiles": ["screen", "{data}/models/demo", "{data}/demo_tiles", "--out", "{out}/screen_tiles",
                     "--workers", "1"],
    "backtest": ["backtest", "{data}/models/demo", "{data}/demo_tiles", "--out", "{out}/backtest", "--workers", "1"],
}

#: JSON keys whose values record when a run happened or how long it took.
VOLATILE_KEYS = {"date_utc", "started", "finished", "seconds", "tile_seconds", "mpx_per_s", "elapsed_s"}

#: Lines of printed output that hold a duration or a speed (pattern -> replacement).
VOLATILE_LINES = (
    (re.compile(r"^frostvane: compiling the pixel loops once.*\n", re.M), ""),
    (re.compile(r"throughput: ([\d.]+) Mpx in [\d.]+ s = [\d.]+ Mpx/s"), r"throughput: \1 Mpx in <s> s = <v> Mpx/s"),
    (re.compile(r"demo took \d+ s"), "demo took <s> s"),
    (re.compile(r"\b\d+(\.\d+)? s elapsed"), "<s> s elapsed"),
)


#: Where ``run`` notes the checkout whose code ran; printed paths into it (the recorded studies in
#: docs/ that the demo shows) are compared as ``<checkout>``.
CHECKOUT_FILE = "checkout.txt"


def run(code, module, dest):
    """Run :data:`COMMANDS` with the code of ``code`` and move their outputs to ``dest``."""
    code = Path(code).resolve()
    dest = Path(dest).resolve()
    if dest.exists():
        sys.exit(f"{dest} exists; choose a new folder")
    if SCRATCH.exists():
        shutil.rmtree(SCRATCH)
    data, out = SCRATCH / "data", SCRATCH / "out"
    shutil.copytree(code / "demo_tiles", data / "demo_tiles")
    shutil.copytree(code / "models" / "demo", data / "models" / "demo")
    out.mkdir(parents=True)
    env = {**os.environ, "PYTHONPATH": str(code), "TQDM_DISABLE": "1"}
    for name, argv in COMMANDS.items():
        argv = [a.format(data=data, out=out) for a in argv]
        script = f"import sys; from {module} import main; sys.exit(main(sys.argv[1:]))"
        done = subprocess.run([sys.executable, "-c", script, *argv], cwd=SCRATCH, env=env,
                              capture_output=True, text=True)
        (out / f"{name}.log").write_text(f"exit {done.returncode}\n{done.stdout}{done.stderr}")
        print(f"{name}: exit {done.returncode}", flush=True)
    (out / CHECKOUT_FILE).write_text(str(code))
    shutil.move(str(out), dest)
    shutil.rmtree(SCRATCH)


def _sha256(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _drop_volatile(obj):
    if isinstance(obj, dict):
        kept = {k: _drop_volatile(v) for k, v in obj.items() if k not in VOLATILE_KEYS}
        if "input_stamps" in kept:  # (size, mtime_ns) of each input: the copy's mtime is the run's own
            kept["input_stamps"] = [stamp[0] for stamp in kept["input_stamps"]]
        return kept
    if isinstance(obj, list):
        return [_drop_volatile(v) for v in obj]
    return obj


def _gpkg_rows(path):
    con = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        tables = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table' ORDER BY name")]
        dump = {}
        for table in tables:
            cursor = con.execute(f'SELECT * FROM "{table}"')
            names = [d[0] for d in cursor.description]
            rows = [tuple(v for n, v in zip(names, row) if n != "last_change") for row in cursor]
            dump[table] = sorted(rows, key=repr)
        return dump
    finally:
        con.close()


def _checkout(folder):
    note = folder / CHECKOUT_FILE
    return note.read_text().strip() if note.is_file() else None


def _text(path, checkout):
    text = path.read_text(errors="replace")
    if checkout:
        text = text.replace(checkout, "<checkout>")
    for pattern, replacement in VOLATILE_LINES:
        text = pattern.sub(replacement, text)
    return text


def same_after_masking(a, b, checkouts=(None, None)):
    """Whether two files that differ in bytes agree once their volatile fields are removed."""
    suffix = a.suffix.lower()
    if suffix == ".json":
        return _drop_volatile(json.loads(a.read_text())) == _drop_volatile(json.loads(b.read_text()))
    if suffix == ".gpkg":
        return _gpkg_rows(a) == _gpkg_rows(b)
    if suffix in (".log", ".txt", ".md", ".csv"):
        return _text(a, checkouts[0]) == _text(b, checkouts[1])
    return False


def compare(before, after):
    """Print how the files of two output folders compare; return the number of files that differ."""
    before, after = Path(before), Path(after)
    names = sorted({p.relative_to(before) for p in before.rglob("*") if p.is_file()}
                   | {p.relative_to(after) for p in after.rglob("*") if p.is_file()})
    names = [name for name in names if str(name) != CHECKOUT_FILE]
    checkouts = (_checkout(before), _checkout(after))
    identical = masked = 0
    differ = []
    for name in names:
        a, b = before / name, after / name
        if not a.is_file() or not b.is_file():
            differ.append(f"{name}: only in {'after' if not a.is_file() else 'before'}")
        elif _sha256(a) == _sha256(b):
            identical += 1
        elif same_after_masking(a, b, checkouts):
            masked += 1
            print(f"same but for run dates, durations, speeds and the checkout's path: {name}")
        else:
            differ.append(f"{name}: differs")
    for line in differ:
        print(f"DIFFERS: {line}")
    print(f"{len(names)} files: {identical} byte-identical, {masked} identical but for run dates, durations, "
          f"speeds and the checkout's path, {len(differ)} differ")
    return len(differ)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    commands = parser.add_subparsers(dest="command", required=True)
    r = commands.add_parser("run", help="Run the commands with one checkout's code.")
    r.add_argument("--code", type=Path, required=True, help="Checkout whose code, demo tiles and model are used.")
    r.add_argument("--module", default="frostvane.cli", help="Module holding the console script's main().")
    r.add_argument("--dest", type=Path, required=True, help="New folder for the outputs.")
    c = commands.add_parser("compare", help="Compare two output folders file by file.")
    c.add_argument("before", type=Path)
    c.add_argument("after", type=Path)
    args = parser.parse_args(argv)
    if args.command == "run":
        run(args.code, args.module, args.dest)
        return 0
    return 1 if compare(args.before, args.after) else 0


if __name__ == "__main__":
    sys.exit(main())
