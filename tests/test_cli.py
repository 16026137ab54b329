"""The frostvane command: exit codes and messages."""

import json
import shutil

from detector.inference.model import sha256_file

from frostvane.cli import main


def test_validate_ok(tiny_tileset, capsys):
    assert main(["validate", str(tiny_tileset)]) == 0
    out = capsys.readouterr().out
    assert "tile" in out.lower()


def test_validate_broken(tiny_tileset, tmp_path, capsys):
    broken = tmp_path / "broken"
    shutil.copytree(tiny_tileset, broken)
    (broken / "consensus.csv").unlink()
    assert main(["validate", str(broken)]) == 2
    err = capsys.readouterr().err
    assert "frostvane: error:" in err and "consensus.csv" in err


def test_train_bad_input(tmp_path, capsys):
    assert main(["train", str(tmp_path / "missing"), "--out", str(tmp_path / "m")]) == 2
    assert "frostvane: error:" in capsys.readouterr().err
    assert not (tmp_path / "m").exists()


def test_evaluate(tiny_model, tiny_tileset, tmp_path, capsys):
    out = tmp_path / "report"
    assert main(["evaluate", str(tiny_model[0]), str(tiny_tileset), "--out", str(out)]) == 0
    assert (out / "report.md").is_file()
    printed = capsys.readouterr().out
    assert "report.md" in printed
    # The tiny model was fitted and calibrated on this very tile set: said, and recorded.
    assert "warning:" in printed and "optimistic" in printed
    meta = json.loads((out / "report.json").read_text())["scores"]["meta"]
    assert meta["images_seen_in_training"]
    assert meta["model_card_sha256"] == sha256_file(tiny_model[0] / "model.json")
    assert set(meta["model_files_sha256"]) == {"detector.onnx", "orientation.onnx", "objects.onnx", "context.onnx"} | (
        {"turn.onnx"} if json.loads((tiny_model[0] / "model.json").read_text())["refine_turn"] else set())
    assert meta["tileset_sha256"]["tiles.csv"] == sha256_file(tiny_tileset / "tiles.csv")
    assert meta["date_utc"].endswith("Z")
    # Three images are too few for a 95 % CI: the report says range, not CI.
    report = (out / "report.md").read_text()
    assert "3 images: too few for a 95 % CI" in report


def test_synth_and_refuse_non_empty(tmp_path, capsys):
    out = tmp_path / "syn"
    args = ["synth", str(out), "--images", "3", "--tiles-per-image", "1", "--seed", "1"]
    assert main(args) == 0
    assert (out / "tiles.csv").is_file()
    assert main(args) == 2
    assert "not empty" in capsys.readouterr().err
    assert main(args + ["--force"]) == 0


def _all_parsers():
    import argparse

    from frostvane.cli import build_parser

    found = []

    def walk(parser, name):
        found.append((name, parser))
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                for sub_name, sub in action.choices.items():
                    walk(sub, f"{name} {sub_name}")

    walk(build_parser(), "frostvane")
    return found


def test_every_option_has_help_and_shows_its_default():
    import argparse

    for name, parser in _all_parsers():
        text = parser.format_help()
        for action in parser._actions:
            if isinstance(action, (argparse._HelpAction, argparse._VersionAction, argparse._SubParsersAction)):
                continue
            assert action.help, f"{name}: {action.dest} has no help"
            if action.option_strings and not action.required:
                assert "default" in parser._get_formatter()._get_help_string(action).lower(), (name, action.dest)
        assert "(default: " in text or name in ("frostvane", "frostvane benchmark"), name


def test_version(capsys):
    import pytest

    with pytest.raises(SystemExit) as info:
        main(["--version"])
    assert info.value.code == 0 and capsys.readouterr().out.startswith("frostvane ")


def test_screen_force_replaces_another_run(tmp_path, capsys):
    import numpy as np

    from detector.io import write_image
    from frostvane.cli import DEFAULT_MODEL
    from training.synth import render_scene, to_uint8

    image, _ = render_scene((200, 256), np.random.default_rng(3), scenario="windy", nodata=False)
    path = tmp_path / "scene.png"
    write_image(path, to_uint8(image))
    out = tmp_path / "out"
    base = ["screen", str(DEFAULT_MODEL), str(path), "--out", str(out)]
    assert main(base) == 0
    (out / "notes.txt").write_text("old")
    assert main(base + ["--tile", "128x100"]) == 2  # another run's folder: refused
    assert "another screening run" in capsys.readouterr().err
    assert main(base + ["--tile", "128x100", "--force"]) == 0
    assert json.loads((out / "run.json").read_text())["parameters"]["tile"] == [128, 100]
    assert not (out / "notes.txt").exists()
    # a tile smaller than one patch would hold no patch: refused by name, the earlier run untouched
    before = (out / "run.json").read_bytes()
    assert main(base + ["--tile", "10x10", "--force"]) == 2
    err = capsys.readouterr().err
    assert err.count("frostvane: error:") == 1 and "tile 10x10 px is smaller" in err, err
    assert (out / "run.json").read_bytes() == before


def test_train_with_an_unreachable_scheduler_writes_nothing(tiny_tileset, tmp_path, monkeypatch, capsys):
    import socket

    import detector.cluster
    from detector._jit import COMPILING_MESSAGE

    monkeypatch.setattr(detector.cluster, "CONNECT_TIMEOUT_S", 1.0)
    with socket.socket() as sock:  # a local port nothing listens on
        sock.bind(("127.0.0.1", 0))
        address = f"tcp://127.0.0.1:{sock.getsockname()[1]}"
    before = sorted(tmp_path.rglob("*"))
    code = main(["train", str(tiny_tileset), "--out", str(tmp_path / "new" / "model"), "--scheduler", address])
    assert code == 2
    # (a fresh machine also announces its first compilation)
    err = [line for line in capsys.readouterr().err.splitlines() if line != COMPILING_MESSAGE]
    assert len(err) == 1 and err[0].startswith("frostvane: error: Dask scheduler ") and repr(address) in err[0]
    assert "cannot be reached" in err[0]
    assert sorted(tmp_path.rglob("*")) == before


def _screen_in_subprocess(image, out, stderr):
    """``frostvane screen`` of one image with the shipped model, in a new process whose stderr is ``stderr``."""
    import os
    import subprocess
    import sys
    from pathlib import Path

    from frostvane.cli import DEFAULT_MODEL

    root = Path(__file__).resolve().parents[1]
    env = {k: v for k, v in os.environ.items() if k != "TQDM_DISABLE"}
    env["PYTHONPATH"] = os.pathsep.join([str(root), env.get("PYTHONPATH", "")])
    return subprocess.run([sys.executable, "-m", "frostvane.cli", "screen", str(DEFAULT_MODEL), str(image), "--out",
                           str(out)], stdout=subprocess.DEVNULL, stderr=stderr, env=env, cwd=root, timeout=600)


def test_progress_bars_are_quiet_when_stderr_is_not_a_terminal(tiny_tileset, tmp_path):
    import fcntl
    import os
    import pty
    import struct
    import subprocess
    import termios
    import threading

    import pandas as pd

    image = tiny_tileset / pd.read_csv(tiny_tileset / "tiles.csv")["path"].iloc[0]
    piped = _screen_in_subprocess(image, tmp_path / "piped", subprocess.PIPE)
    assert piped.returncode == 0, piped.stderr
    # A pipe or log file gets no bar (tqdm would write 'screen: ... 1/1 ... tile/s' and carriage returns).
    assert b"\r" not in piped.stderr and b"1/1" not in piped.stderr, piped.stderr
    # The same run on a terminal (a pseudo-terminal stands in for one) shows its bar. The terminal is
    # read while the run writes: Linux drops what is unread once the run's side closes.
    leader, follower = pty.openpty()
    # tqdm draws nothing on a terminal of zero columns: give it the size of a real one.
    fcntl.ioctl(follower, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 100, 0, 0))
    shown = []

    def drain():
        while True:
            try:
                chunk = os.read(leader, 65536)
            except OSError:  # EIO: the run's side is closed
                return
            if not chunk:
                return
            shown.append(chunk)

    reader = threading.Thread(target=drain, daemon=True)
    reader.start()
    try:
        on_tty = _screen_in_subprocess(image, tmp_path / "tty", follower)
    finally:
        os.close(follower)
    reader.join(timeout=10)
    os.close(leader)
    shown = b"".join(shown)
    assert on_tty.returncode == 0
    assert b"screen" in shown and b"1/1" in shown, shown


def _readme_screening_columns():
    """Column names the README documents for the screening folder, and those given with a unit cell.

    Tables list a column per row (first cell) and its unit (second cell); a row may name a family as
    ``prefix_first``, ``_second``, ...; the tile-set contract above them names the consensus columns
    that detections share.
    """
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## The tile-set contract"):text.index("## The evaluation folder")]
    named, with_unit = set(re.findall(r"`([a-z][a-z0-9_]*)`", section)), set()
    for row in re.findall(r"^\| (`[^|]+`) \| ([^|]*) \|$", section, flags=re.MULTILINE):
        names = re.findall(r"`([a-z_][a-z0-9_]*)`", row[0])
        prefix = names[0].rsplit("_", 1)[0]
        full = [prefix + n if n.startswith("_") else n for n in names]
        named.update(full)
        if row[1].strip():
            with_unit.update(full)
    return named, with_unit


def test_readme_documents_every_screening_output_column(tiny_tileset, tmp_path):
    import pandas as pd

    from frostvane.cli import DEFAULT_MODEL

    out = tmp_path / "screen"
    assert main(["screen", str(DEFAULT_MODEL), str(tiny_tileset), "--out", str(out)]) == 0
    named, with_unit = _readme_screening_columns()
    tiles = list(pd.read_csv(out / "tiles.csv", nrows=0).columns)
    detections = list(pd.read_csv(out / "detections.csv", nrows=0).columns)
    # Every tiles.csv column has its own table row with a unit or value set.
    assert [c for c in tiles if c not in with_unit] == []
    # Every detections.csv column is named (its own row, or a consensus column of the contract).
    assert [c for c in detections if c not in named] == []
    assert {"score", "lon_deg", "azimuth_deg"} <= with_unit  # the parser does read the detection table


def test_demo_refuses_a_damaged_model_before_writing(tmp_path, capsys):
    from pathlib import Path

    from frostvane.cli import DEFAULT_MODEL

    model = tmp_path / "model"
    shutil.copytree(DEFAULT_MODEL, model)
    card = json.loads((model / "model.json").read_text())
    card["assembly"]["min_score"] = float("nan")
    (model / "model.json").write_text(json.dumps(card))  # json writes NaN as the bare token NaN
    tiles = Path(__file__).resolve().parents[1] / "demo_tiles"
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--tiles", str(tiles), "--model", str(model)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "min_score" in err
    assert not out.exists()


def test_workers_must_be_a_whole_number_of_at_least_one(tmp_path, capsys):
    import pytest

    for command in (["train", "set", "--out", "m"], ["evaluate", "model", "set", "--out", "r"],
                    ["backtest", "model", "set", "--out", "b"], ["labelling-order", "model", "set", "--out", "o"],
                    ["benchmark", "run", "model", "bench", "--out", "x"]):
        for value in ("0", "-1", "two"):
            with pytest.raises(SystemExit) as info:
                main([*command, "--workers", value])
            err = capsys.readouterr().err
            assert info.value.code == 2 and f"workers {value!r} must be a whole number >= 1" in err, (command, err)
