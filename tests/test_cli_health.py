"""``sparseindex health``: every output form, the plot, and each bad input."""

import json

import pytest

from sparseindex import Codes, Store
from sparseindex.cli import main


@pytest.fixture(scope="module")
def saved(tmp_path_factory):
    path = tmp_path_factory.mktemp("health") / "orchard.sidx"
    store = Store.for_target(512, 16, false_hit=1e-4, capacity=5_000, seed=3)
    store.add(Codes.random(3_000, 512, 16, seed=3))
    store.save(path)
    return path, store


def run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_text_report(saved, capsys):
    path, store = saved
    code, out, err = run(["health", str(path)], capsys)
    assert code == 0 and err == ""
    assert out.startswith(f"status: {store.health().status.upper()}") and "3,000 codes stored" in out
    assert "not proof of identity" in out


def test_json_and_openmetrics(saved, capsys):
    path, store = saved
    code, out, _ = run(["health", str(path), "--json"], capsys)
    report = json.loads(out)
    assert code == 0 and report["items"] == 3_000 and report["limit"] == store.health().limit
    code, out, _ = run(["health", str(path), "--openmetrics", "--measure", "500", "--seed", "1"], capsys)
    assert code == 0 and out.endswith("# EOF\n") and "sparseindex_measured_queries" in out


def test_measure_and_plot(saved, capsys, tmp_path):
    pytest.importorskip("matplotlib")
    path, _ = saved
    png = tmp_path / "headroom.png"
    code, out, err = run(["health", str(path), "--measure", "2000", "--source", "usage", "--seed", "2",
                          "--plot", str(png)], capsys)
    assert code == 0 and "measurement of 2,000 usage queries" in out
    assert f"plot written to {png}" in err
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.parametrize(
    "argv, message",
    [
        (["health", "/nonexistent/store.sidx"], "no such file: '/nonexistent/store.sidx'"),
        (["health", "{bad}"], "section 'preamble'"),
        (["health", "{good}", "--measure", "-5"], "--measure -5 must be >= 0"),
        (["health", "{good}", "--false-hit", "2"], "false_hit=2.0 must be a chance"),
        (["health", "{good}", "--warn-fraction", "0"], "warn_fraction=0.0"),
    ],
)
def test_bad_input_exits_2_with_one_line(saved, capsys, tmp_path, argv, message):
    bad = tmp_path / "not-a-store.sidx"
    bad.write_bytes(b"orchard inventory, not a store\n")
    argv = [a.replace("{bad}", str(bad)).replace("{good}", str(saved[0])) for a in argv]
    code, out, err = run(argv, capsys)
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and err.startswith("sparseindex health: ") and message in err, err
