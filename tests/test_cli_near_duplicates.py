"""The ``sparseindex near-duplicates`` subcommand: every input form, outputs, and each bad input's message.

Reference for the labels: :func:`sparseindex.near_duplicates` on the same codes
(itself checked against scipy.sparse brute force in ``test_near_duplicates.py``); the
files are written with numpy (``np.save``, ``np.savez``) and
``scipy.sparse.save_npz``.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pytest
import scipy.sparse as sp

from sparseindex import label_near_duplicates
from sparseindex.cli import main
from sparseindex.near_duplicates import planted_duplicates

MIN = 18


@pytest.fixture(scope="module")
def codes():
    c, _, _ = planted_duplicates(1500, 300, 24, fraction=0.2, max_changed=6, chain=0.2, seed=12)
    return c


@pytest.fixture()
def files(tmp_path, codes):
    index = np.stack(codes.to_indices()).astype(np.int32)
    padded = np.full((len(codes), 30), -1, dtype=np.int64)
    padded[:, :24] = index
    paths = {
        "index": tmp_path / "index.npy",
        "padded": tmp_path / "padded.npy",
        "dense": tmp_path / "dense.npy",
        "sparse": tmp_path / "codes.npz",
    }
    np.save(paths["index"], index)
    np.save(paths["padded"], padded)
    np.save(paths["dense"], codes.to_dense())
    sp.save_npz(paths["sparse"], sp.csr_matrix(codes.to_scipy()))
    return {k: str(v) for k, v in paths.items()}


def run(argv, capsys):
    status = main(["near-duplicates"] + argv)
    captured = capsys.readouterr()
    return status, captured.out, captured.err


@pytest.mark.parametrize("form", ["index", "padded", "dense", "sparse"])
@pytest.mark.parametrize("mode", ["first", "components"])
def test_every_input_form_writes_the_library_labels(form, mode, files, codes, tmp_path, capsys):
    out = str(tmp_path / f"labels-{form}-{mode}.npy")
    argv = [files[form], "--min-overlap", str(MIN), "--mode", mode, "--out", out]
    if form in ("index", "padded"):
        argv += ["--bits", "300"]
    status, stdout, err = run(argv, capsys)
    assert status == 0, err
    want = label_near_duplicates(codes, min_overlap=MIN, mode=mode)
    got = np.load(out)
    assert got.dtype == np.int64 and np.array_equal(got, want)
    assert f"sparseindex near-duplicates: {files[form]}" in stdout
    assert f"groups: {len(np.unique(want)):,}" in stdout and f"labels: {out}" in stdout
    assert f"mode {mode}" in stdout
    assert not [f for f in os.listdir(tmp_path) if f.startswith(".labels-")]  # no temporary left


def test_width_of_an_index_matrix_is_inferred_without_bits(files, codes, capsys):
    status, stdout, _ = run([files["index"], "--min-overlap", str(MIN), "--json"], capsys)
    assert status == 0
    record = json.loads(stdout)
    assert record["bits"] == int(np.stack(codes.to_indices()).max()) + 1
    assert record["groups"] == len(np.unique(label_near_duplicates(codes, min_overlap=MIN)))


def test_json_summary_names_method_bands_and_recall(files, capsys):
    status, stdout, _ = run([files["sparse"], "--min-overlap", str(MIN), "--method", "banding",
                             "--seed", "4", "--recall", "0.999", "--json"], capsys)
    assert status == 0
    record = json.loads(stdout)
    assert record["method"] == "banding" and record["seed"] == 4 and record["out"] is None
    assert record["predicted_recall"] >= 0.999 and record["bands"] >= 1 and record["rows"] >= 1
    assert record["input"] == files["sparse"]


def test_progress_bar_on_stderr_only_when_asked(files, capsys):
    status, stdout, err = run([files["dense"], "--min-overlap", str(MIN), "--method", "index", "--progress"], capsys)
    assert status == 0 and "index" in err and "%" in err
    assert "index:" not in stdout.split("method")[0]
    status, _, err = run([files["dense"], "--min-overlap", str(MIN), "--no-progress"], capsys)
    assert status == 0 and err == ""


def _bad_files(tmp_path):
    """Each bad input file: name -> path."""
    made = {}

    def save(name, array, **kw):
        path = tmp_path / name
        np.save(path, array, **kw)
        made[name] = str(path)

    save("floats.npy", np.zeros((3, 4), dtype=np.float64))
    save("flat.npy", np.arange(5))
    save("cube.npy", np.zeros((2, 2, 2), dtype=bool))
    save("objects.npy", np.array([[1, 2], [3]], dtype=object), allow_pickle=True)
    save("high.npy", np.array([[1, 2], [3, 300]]))
    save("negative.npy", np.array([[1, 2], [3, -5]]))
    save("high_padded.npy", np.array([[1, -1], [3, 300]]))
    save("repeat.npy", np.array([[1, 2], [3, 3]]))
    save("narrow.npy", np.zeros((2, 10), dtype=bool))
    not_sparse = tmp_path / "plain.npz"
    np.savez(not_sparse, a=np.arange(3))
    made["plain.npz"] = str(not_sparse)
    twos = tmp_path / "twos.npz"
    sp.save_npz(twos, sp.csr_matrix(np.array([[0, 2, 1]])))
    made["twos.npz"] = str(twos)
    text = tmp_path / "codes.txt"
    text.write_text("1 2 3\n")
    made["codes.txt"] = str(text)
    made["folder.npy"] = str(tmp_path / "folder.npy")
    os.mkdir(made["folder.npy"])
    save("truncated.npy", np.zeros((100, 64), dtype=bool))
    with open(made["truncated.npy"], "r+b") as f:
        f.truncate(200)
    garbage = tmp_path / "garbage.npy"
    garbage.write_bytes(b"not an array at all")
    made["garbage.npy"] = str(garbage)
    return made


@pytest.mark.parametrize("name,extra,message", [
    ("missing.npy", [], "missing.npy: no such file"),
    ("folder.npy", [], "folder.npy: is a folder, not a file of codes"),
    ("codes.txt", [], "codes.txt: unknown file type '.txt'; expected .npy or .npz"),
    ("floats.npy", [], "floats.npy: dtype float64 is neither bool (dense rows) nor integer"),
    ("flat.npy", [], "flat.npy: expected a 2-D array (one code per row), got shape (5,)"),
    ("cube.npy", [], "cube.npy: expected a 2-D array (one code per row), got shape (2, 2, 2)"),
    ("objects.npy", [], "objects.npy: holds Python objects (dtype object); expected a bool or integer array"),
    ("garbage.npy", [], "garbage.npy: not a .npy file (no NumPy header)"),
    ("truncated.npy", [], "truncated.npy: not a readable .npy array"),
    ("high.npy", ["--bits", "256"], "high.npy: row 1: bit index 300 is out of range for bits=256 (valid 0..255)"),
    ("high_padded.npy", ["--bits", "256"], "high_padded.npy: row 1: bit index 300 is out of range for bits=256"),
    ("negative.npy", [], "negative.npy: row 1: bit index -5 is negative (-1 is the only padding value)"),
    ("repeat.npy", [], "repeat.npy: row 1: duplicate bit index 3"),
    ("narrow.npy", ["--bits", "12"], "narrow.npy: bool rows are 10 bits wide, but --bits=12"),
    ("plain.npz", [], "plain.npz: not a scipy.sparse .npz file"),
    ("twos.npz", [], "twos.npz: row 0: value 2 at bit index 1 is not 0 or 1"),
])
def test_bad_input_exits_2_with_one_line_naming_the_fault(name, extra, message, tmp_path, capsys):
    path = _bad_files(tmp_path).get(name, str(tmp_path / name))
    status, stdout, err = run([path, "--min-overlap", "2"] + extra, capsys)
    assert status == 2
    assert stdout == ""
    assert len(err.strip().splitlines()) == 1
    assert err.startswith("sparseindex near-duplicates: ")
    assert message in err, err


@pytest.mark.parametrize("extra,message", [
    (["--min-overlap", "0"], "min_overlap=0 must be >= 1"),
    (["--min-overlap", "999"], "min_overlap=999 exceeds bits=300"),
    (["--min-overlap", "5", "--recall", "2"], "recall=2.0 must be a number in (0, 1]"),
    (["--min-overlap", "5", "--out", "labels.txt"], "--out labels.txt: the labels file must end in .npy"),
    (["--min-overlap", "5", "--out", "/no/such/folder/labels.npy"], "folder /no/such/folder does not exist"),
])
def test_bad_options_exit_2_with_one_line(extra, message, files, capsys):
    status, stdout, err = run([files["dense"]] + extra, capsys)
    assert status == 2 and stdout == ""
    assert len(err.strip().splitlines()) == 1 and message in err, err


@pytest.mark.parametrize("argv,message", [
    (["x.npy", "--min-overlap", "many"], "'many' is not a whole number"),
    (["x.npy"], "the following arguments are required: --min-overlap"),
    (["x.npy", "--min-overlap", "3", "--mode", "all"], "invalid choice: 'all'"),
    (["x.npy", "--min-overlap", "3", "--progress", "--no-progress"], "not allowed with argument"),
])
def test_malformed_arguments_exit_2(argv, message, capsys):
    with pytest.raises(SystemExit) as info:
        main(["near-duplicates"] + argv)
    assert info.value.code == 2
    assert message in capsys.readouterr().err


def test_an_existing_labels_file_is_replaced_whole(files, tmp_path, capsys):
    out = tmp_path / "labels.npy"
    np.save(out, np.arange(3))
    status, _, _ = run([files["dense"], "--min-overlap", str(MIN), "--out", str(out)], capsys)
    assert status == 0 and np.load(out).shape == (1500,)
