"""The frostvane command: exit codes and messages."""

import shutil

from training.cli import main


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
    assert "report.md" in capsys.readouterr().out


def test_synth_and_refuse_non_empty(tmp_path, capsys):
    out = tmp_path / "syn"
    args = ["synth", str(out), "--images", "3", "--tiles-per-image", "1", "--seed", "1"]
    assert main(args) == 0
    assert (out / "tiles.csv").is_file()
    assert main(args) == 2
    assert "not empty" in capsys.readouterr().err
    assert main(args + ["--force"]) == 0
