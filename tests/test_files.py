"""Output files: one writer for every command, the normal file mode, one rule for folders.

A file the engine writes must be readable by another user (a delivery app, a web server)
exactly as a file from a plain ``open(path, "w")`` is: mode 0666 less the umask, so 0644
under the common umask 022 (POSIX ``open``/``creat``: the mode is masked by the process's
file mode creation mask).  A temporary file from :func:`tempfile.mkstemp` is 0600, so a
writer that renames one into place without fixing its mode fails this.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from adaptive_engine import files
from adaptive_engine.cli import main
from adaptive_engine.errors import OutputError

ROOT = Path(__file__).resolve().parents[1]
BANK = ROOT / "item_banks" / "meridian_valley_operator.csv"
DESIGN = ROOT / "simulations" / "minimal.toml"


@pytest.fixture
def umask_022():
    old = os.umask(0o022)
    try:
        yield
    finally:
        os.umask(old)


def _mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


def _run(*args, codes=(0,)):
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exit_code in codes, result.output
    return result


def _answers(path: Path, n: int = 300, seed: int = 5) -> Path:
    # invented test input: 4 items of a 2PL answered by N(0, 1) examinees
    rng = np.random.default_rng(seed)
    a, b = np.array([1.0, 1.4, 0.8, 1.2]), np.array([-0.8, 0.0, 0.4, 1.0])
    theta = rng.normal(size=n)
    p = 1 / (1 + np.exp(-a * (theta[:, None] - b)))
    x = (rng.random(p.shape) < p).astype(int)
    rows = ["person_id,item_id,response"]
    rows += [f"p{i},Q{j},{x[i, j]}" for i in range(n) for j in range(4)]
    path.write_text("\n".join(rows) + "\n")
    return path


def test_every_command_writes_files_with_the_normal_mode(tmp_path, umask_022):
    written = []
    # bank convert
    _run("bank", "convert", BANK, tmp_path / "bank.json")
    _run("bank", "convert", BANK, tmp_path / "bank.db")
    written += [tmp_path / "bank.json", tmp_path / "bank.db"]
    # simulate (a folder of files)
    _run("simulate", DESIGN, "--bank", BANK, "--examinees", "40", "--seed", "1", "--out", tmp_path / "sim")
    written += sorted((tmp_path / "sim").iterdir())
    # tune
    _run("tune", DESIGN, "--bank", BANK, "--vary", "stopping.max_items=6,8", "--examinees", "40",
         "--out", tmp_path / "tune")
    written += sorted((tmp_path / "tune").iterdir())
    # exposure calibrate (exit 3: two iterations need not converge; the file is written anyway)
    _run("exposure", "calibrate", DESIGN, "--bank", BANK, "--target", "0.3", "--examinees", "100",
         "--iterations", "2", "--out", tmp_path / "exposure.csv", codes=(0, 3))
    written.append(tmp_path / "exposure.csv")
    # calibrate, with the item report
    _run("calibrate", _answers(tmp_path / "answers.csv"), "--model", "2PL", "--out", tmp_path / "calibrated.json",
         "--fit-report", tmp_path / "fit.csv")
    written += [tmp_path / "calibrated.json", tmp_path / "fit.csv"]
    assert len(written) >= 14
    modes = {p.name: oct(_mode(p)) for p in written}
    assert set(modes.values()) == {oct(0o644)}, modes
    # no temporary file is left behind anywhere
    leftovers = [p for p in tmp_path.rglob(".*") if p.is_file()]
    assert leftovers == []


def test_the_mode_follows_the_umask(tmp_path):
    old = os.umask(0o027)
    try:
        files.write_text(tmp_path / "a.txt", "x\n")
        files.atomic_write(tmp_path / "b.bin", lambda temp: temp.write_bytes(b"\x00"))
    finally:
        os.umask(old)
    assert _mode(tmp_path / "a.txt") == 0o640
    assert _mode(tmp_path / "b.bin") == 0o640


@pytest.mark.parametrize("args", [
    ["bank", "convert", BANK, "{missing}/bank.json"],
    ["simulate", DESIGN, "--bank", BANK, "--examinees", "20", "--out", "{missing}/sim"],
    ["tune", DESIGN, "--bank", BANK, "--vary", "stopping.max_items=6,8", "--examinees", "20",
     "--out", "{missing}/tune"],
    ["exposure", "calibrate", DESIGN, "--bank", BANK, "--target", "0.3", "--examinees", "50",
     "--iterations", "1", "--out", "{missing}/exposure.csv"],
])
def test_a_missing_folder_is_refused_the_same_way_everywhere(tmp_path, args):
    # the rule of adaptive_engine.files: the folder holding an output must exist; it is named
    missing = tmp_path / "not_there"
    result = CliRunner().invoke(main, [str(a).format(missing=missing) for a in args])
    assert result.exit_code == 2, result.output
    assert f"the folder {missing} does not exist" in result.output
    assert not missing.exists()


def test_an_output_folder_is_created_but_not_its_parents(tmp_path):
    folder, created = files.prepare_folder(tmp_path / "new")
    assert created and folder.is_dir()
    assert files.prepare_folder(folder) == (folder, False)
    with pytest.raises(OutputError, match=f"the folder {tmp_path / 'a'} does not exist"):
        files.prepare_folder(tmp_path / "a" / "b")
    (tmp_path / "plain").write_text("")
    with pytest.raises(OutputError, match="this is a file, not a folder"):
        files.prepare_folder(tmp_path / "plain")


def test_staged_files_appear_together_or_not_at_all(tmp_path):
    (tmp_path / "a.csv").write_text("old\n")
    with pytest.raises(RuntimeError):
        with files.StagedFiles(tmp_path) as staged:
            staged.write_text("a.csv", "new\n")
            staged.write_text("b.csv", "new\n")
            raise RuntimeError("failure before the commit")
    assert (tmp_path / "a.csv").read_text() == "old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.csv"]
    with files.StagedFiles(tmp_path) as staged:
        staged.write_text("a.csv", "new\n")
        staged.write_text("b.csv", "new\n")
        staged.commit()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.csv", "b.csv"]
    assert (tmp_path / "a.csv").read_text() == "new\n"


def test_an_unwritable_folder_is_named_not_the_temporary_file(tmp_path, monkeypatch):
    # a folder the user may not write into (simulated: the tests may run as root, who may)
    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(files.tempfile, "mkstemp", refuse)
    with pytest.raises(OutputError) as info:
        files.write_text(tmp_path / "x.txt", "x")
    assert str(info.value) == f"{tmp_path / 'x.txt'}: cannot write into the folder {tmp_path}: Permission denied"
