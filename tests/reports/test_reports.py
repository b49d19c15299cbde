"""Tests of the run-folder layer: HDF5 results, summaries, checkpoints, plots, HTML, progress."""

from __future__ import annotations

import io
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from largeq.reports.progress import progress_bar, progress_enabled
from largeq.reports.checkpoint import (
    CheckpointCorruptError,
    CheckpointMismatchError,
    Checkpointer,
    checkpoint_path,
    load_checkpoint,
    save_checkpoint,
)
from largeq.reports.html import Section, format_number, format_value_error, write_report
from largeq.reports.plots import (
    plot_distance,
    plot_relaxation,
    plot_spectra,
    plot_survival,
    plot_thermal,
    plot_versus_size,
)
from largeq.reports.store import (
    Quantity,
    make_run_folder,
    package_versions,
    read_results,
    read_summary,
    run_metadata,
    to_jsonable,
    write_results,
    write_summary,
)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
REPO_ROOT = Path(__file__).resolve().parents[2]


# ----------------------------------------------------------------------------- HDF5 results
def test_results_round_trip(tmp_path):
    rng = np.random.default_rng(1)
    psi = rng.normal(size=5000) + 1j * rng.normal(size=5000)  # big enough to be gzipped
    times = np.linspace(0, 10, 11)
    tree = {
        "dynamics": {
            "times": Quantity(times, "1/J", "output times"),
            "curves": {"sz_0": np.cos(times), "sz_1": [0.5, 0.25, 0.125]},
            "psi": psi,
        },
        "d_eff": Quantity(123.5, "", "effective dimension 1/sum|c|^4"),
        "n_states": 924,
        "converged": True,
        "z": 1.5 - 0.5j,
        "method": "chebyshev",
        "labels": ["a", "bb"],
        "missing": None,
    }
    attrs = {
        "scenario": "[model]\nL = 12\n",
        "seed": 7,
        "tolerance": 1e-10,
        "versions": {"numpy": "2.4", "h5py": "3.16"},
        "sizes": [12, 14],
        "not_a_number": float("nan"),
    }
    path = write_results(tmp_path / "results.h5", tree, attrs=attrs)
    assert path.exists() and not (tmp_path / "results.h5.tmp").exists()

    back, battrs = read_results(path)
    dyn = back["dynamics"]
    assert isinstance(dyn["times"], Quantity)
    assert dyn["times"].units == "1/J" and dyn["times"].description == "output times"
    np.testing.assert_array_equal(dyn["times"].value, times)
    np.testing.assert_array_equal(dyn["curves"]["sz_0"], np.cos(times))
    np.testing.assert_array_equal(dyn["curves"]["sz_1"], [0.5, 0.25, 0.125])
    assert dyn["psi"].dtype == np.complex128
    np.testing.assert_array_equal(dyn["psi"], psi)
    assert back["d_eff"] == Quantity(123.5, "", "effective dimension 1/sum|c|^4")
    assert back["n_states"] == 924 and isinstance(back["n_states"], int)
    assert back["converged"] is True
    assert back["z"] == 1.5 - 0.5j
    assert back["method"] == "chebyshev"
    assert back["labels"] == ["a", "bb"]
    assert back["missing"] is None

    assert battrs["scenario"] == attrs["scenario"]
    assert battrs["seed"] == 7 and battrs["tolerance"] == 1e-10
    assert battrs["versions"] == {"numpy": "2.4", "h5py": "3.16"}
    assert battrs["sizes"] == [12, 14]
    assert battrs["not_a_number"] is None

    # raw HDF5 view: units are real dataset attributes, big arrays are compressed
    with h5py.File(path, "r") as fh:
        assert fh["dynamics/times"].attrs["units"] == "1/J"
        assert fh["dynamics/psi"].compression == "gzip"
        assert fh["dynamics/curves/sz_0"].compression is None
        assert json.loads(fh.attrs["versions"]) == attrs["versions"]

    plain, _ = read_results(path, quantities=False)
    assert isinstance(plain["d_eff"], float)


def test_results_rejects_bad_names_and_keeps_old_file(tmp_path):
    path = tmp_path / "results.h5"
    write_results(path, {"a": np.arange(3)}, attrs={"v": 1})
    with pytest.raises(ValueError):
        write_results(path, {"a/b": 1.0}, attrs={})
    with pytest.raises(TypeError):
        write_results(path, {"obj": np.array([object()], dtype=object)}, attrs={})
    tree, attrs = read_results(path)  # the failed writes left the old file intact
    np.testing.assert_array_equal(tree["a"], np.arange(3))
    assert attrs["v"] == 1
    assert not (tmp_path / "results.h5.tmp").exists()


# ----------------------------------------------------------------------------- summary JSON
def test_summary_handles_numpy_types_and_nan(tmp_path):
    summary = {
        "zeta": np.float32(0.5),
        "count": np.int64(3),
        "flag": np.bool_(True),
        "arr": np.array([1.0, np.nan, np.inf]),
        "nested": {"b": (1, 2), "a": float("nan")},
        "z": np.complex128(1 - 2j),
        "q": Quantity(np.float64(2.0), "J", "energy"),
        "path": tmp_path,
    }
    path = write_summary(tmp_path / "summary.json", summary)
    text = path.read_text()
    assert "NaN" not in text and "Infinity" not in text
    assert text.index('"arr"') < text.index('"count"') < text.index('"zeta"')  # sorted
    assert '\n  "arr"' in text  # indent 2
    back = read_summary(path)
    assert back["zeta"] == 0.5 and back["count"] == 3 and back["flag"] is True
    assert back["arr"] == [1.0, None, None]
    assert back["nested"] == {"a": None, "b": [1, 2]}
    assert back["z"] == {"real": 1.0, "imag": -2.0}
    assert back["q"] == {"value": 2.0, "units": "J", "description": "energy"}
    assert back["path"] == str(tmp_path)
    with pytest.raises(TypeError):
        to_jsonable(object())


def test_versions_and_metadata():
    v = package_versions()
    for key in ("python", "numpy", "scipy", "numba", "h5py", "matplotlib", "largeq"):
        assert isinstance(v[key], str) and v[key]
    assert v["numpy"] == np.__version__
    m = run_metadata()
    assert m["cpu_count"] >= 1 and m["memory_total_bytes"] > 0
    assert m["timestamp_utc"].endswith("Z") and m["hostname"]
    json.dumps(m)  # plain JSON types only


def test_make_run_folder(tmp_path):
    auto = make_run_folder(None, "neel quench/L=12", root=tmp_path / "runs")
    assert auto.is_dir() and auto.parent == tmp_path / "runs"
    assert auto.name.startswith("neel-quench-L-12-") and auto.name.endswith("Z")
    auto2 = make_run_folder(None, "neel quench/L=12", root=tmp_path / "runs")
    assert auto2 != auto  # same second: a fresh folder anyway

    given = make_run_folder(tmp_path / "a" / "b", "x")
    assert given == tmp_path / "a" / "b" and (given / ".largeq-run").exists()
    assert make_run_folder(given, "x") == given  # reuse (resume)

    afile = tmp_path / "file.txt"
    afile.write_text("hi")
    with pytest.raises(FileExistsError):
        make_run_folder(afile, "x")
    other = tmp_path / "other"
    other.mkdir()
    (other / "notes.txt").write_text("mine")
    with pytest.raises(FileExistsError):
        make_run_folder(other, "x")


# ----------------------------------------------------------------------------- checkpoints
def test_checkpoint_round_trip_and_fingerprint(tmp_path):
    assert load_checkpoint(tmp_path) is None
    psi = (np.arange(1000) + 1j * np.arange(1000)[::-1]).astype(np.complex128)
    state = {"psi": psi, "step": 17, "t": 3.25, "rng": "PCG64:abc", "done": False}
    save_checkpoint(tmp_path, state, {"n_steps": 100}, fingerprint="fp-A")
    st, meta = load_checkpoint(tmp_path, expect_fingerprint="fp-A")
    np.testing.assert_array_equal(st["psi"], psi)
    assert st["step"] == 17 and st["t"] == 3.25 and st["rng"] == "PCG64:abc"
    assert st["done"] is False
    assert meta["n_steps"] == 100 and meta["fingerprint"] == "fp-A"
    assert load_checkpoint(tmp_path) is not None  # no expectation: loads
    with pytest.raises(CheckpointMismatchError, match="different scenario"):
        load_checkpoint(tmp_path, expect_fingerprint="fp-B")
    with pytest.raises(TypeError):
        save_checkpoint(tmp_path, {"bad": [1, 2]}, {})


def test_checkpoint_detects_tampering(tmp_path):
    save_checkpoint(tmp_path, {"v": np.ones(50)}, {}, fingerprint="f")
    with h5py.File(checkpoint_path(tmp_path), "r+") as fh:
        fh["state/v"][3] = 2.0
    with pytest.raises(CheckpointCorruptError, match="checksum"):
        load_checkpoint(tmp_path)
    save_checkpoint(tmp_path, {"v": np.ones(50)}, {}, fingerprint="f")
    with h5py.File(checkpoint_path(tmp_path), "r+") as fh:
        fh.attrs["complete"] = False
    with pytest.raises(CheckpointCorruptError, match="complete"):
        load_checkpoint(tmp_path)
    checkpoint_path(tmp_path).write_bytes(b"\x89HDF\r\n\x1a\ngarbage")  # truncated file
    with pytest.raises(CheckpointCorruptError):
        load_checkpoint(tmp_path)


def test_checkpoint_failed_replace_keeps_old(tmp_path, monkeypatch):
    save_checkpoint(tmp_path, {"x": np.zeros(10), "k": 1}, {"gen": 1}, fingerprint="f")

    def boom(src, dst):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(OSError, match="simulated"):
        save_checkpoint(tmp_path, {"x": np.ones(10), "k": 2}, {"gen": 2}, fingerprint="f")
    monkeypatch.undo()
    st, meta = load_checkpoint(tmp_path, expect_fingerprint="f")
    assert st["k"] == 1 and meta["gen"] == 1
    np.testing.assert_array_equal(st["x"], np.zeros(10))
    assert not (tmp_path / "checkpoint.h5.tmp").exists()


_WRITER = textwrap.dedent(
    """
    import sys
    import numpy as np
    from largeq.reports.checkpoint import save_checkpoint
    folder, start = sys.argv[1], int(sys.argv[2])
    k = start
    while True:
        v = np.full(400_000, k, dtype=np.complex128)   # 6.4 MB per checkpoint
        save_checkpoint(folder, {"v": v, "k": k}, {"k": k}, fingerprint="kill-test")
        if k == start:
            print("saved", flush=True)
        k += 1
    """
)


def test_checkpoint_survives_sigkill_mid_write(tmp_path):
    """Kill a writer at random moments: the checkpoint is always the old or a new one."""
    script = tmp_path / "writer.py"
    script.write_text(_WRITER)
    folder = tmp_path / "run"
    folder.mkdir()
    env = dict(os.environ, PYTHONPATH=str(REPO_ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    rng = np.random.default_rng(0)
    last_k = -1
    for trial in range(3):
        proc = subprocess.Popen(
            [sys.executable, str(script), str(folder), str(last_k + 1)],
            stdout=subprocess.PIPE, env=env,
        )
        try:
            line = proc.stdout.readline()
            assert line.strip() == b"saved", line
            time.sleep(float(rng.uniform(0.0, 0.15)))
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.wait()
            proc.stdout.close()
        loaded = load_checkpoint(folder, expect_fingerprint="kill-test")
        assert loaded is not None
        st, meta = loaded
        k = st["k"]
        assert k == meta["k"] and k > last_k
        assert st["v"].shape == (400_000,)
        assert np.all(st["v"] == k)
        last_k = k


def test_checkpointer_interval(tmp_path):
    now = [0.0]
    ck = Checkpointer(tmp_path, 10.0, fingerprint="fp", clock=lambda: now[0])
    calls = []

    def build():
        calls.append(now[0])
        return {"t": now[0]}, {"note": "x"}

    assert ck.maybe_save(build) is False and calls == []  # lazily not built
    now[0] = 9.9
    assert ck.maybe_save(build) is False
    now[0] = 10.0
    assert ck.maybe_save(build) is True and calls == [10.0]
    now[0] = 15.0
    assert ck.maybe_save(build) is False
    ck.force_save({"t": 15.0})
    st, meta = ck.load()
    assert st["t"] == 15.0 and meta["fingerprint"] == "fp"
    now[0] = 24.0
    assert ck.maybe_save(build) is False  # force_save reset the timer
    now[0] = 25.0
    assert ck.maybe_save(build) is True and ck.n_saves == 3
    with pytest.raises(CheckpointMismatchError):
        Checkpointer(tmp_path, 1.0, fingerprint="other").load()


# ----------------------------------------------------------------------------- plots
def _assert_png(path: Path, min_bytes: int = 5000) -> None:
    data = Path(path).read_bytes()
    assert data[:8] == PNG_SIGNATURE
    assert len(data) > min_bytes


def test_plots_write_png_files(tmp_path):
    import matplotlib

    backend_before = matplotlib.get_backend()
    rc_before = dict(matplotlib.rcParams)
    t = np.linspace(0, 20, 200)
    a = np.exp(-t / 3) * np.cos(2 * t)
    b = 0.1 + 0.2 * np.exp(-t)
    ravg = np.cumsum(a) / np.arange(1, t.size + 1)
    out = [
        plot_relaxation(
            tmp_path / "relax.png", t, {"σz_0": a, "xx": b + 0j},
            running_average={"σz_0": ravg},
            equilibrium={"σz_0": (0.0, 0.05), "xx": (0.1, 0.01)},
            window=(10, 20), thermal={"σz_0": {"canonical": 0.02, "microcanonical": -0.01}},
            title="quench <test>",
        ),
        plot_distance(tmp_path / "dist.png", t, {"σz_0": (a - 0.0) ** 2, "xx": (b - 0.1) ** 2},
                      fluctuation_level={"σz_0": 1e-3}),
        plot_survival(tmp_path / "surv.png", t, np.exp(-t) + 1e-3, plateau=1e-3,
                      inverse_deff=1.2e-3),
        plot_spectra(tmp_path / "spec.png", np.linspace(-5, 5, 300),
                     np.exp(-np.linspace(-5, 5, 300) ** 2), 100 * np.ones(300),
                     dos_err=5 * np.ones(300), state_energy=0.1, state_width=1.0,
                     title="spectra"),
        plot_thermal(tmp_path / "thermal.png", np.linspace(0.5, 5, 20),
                     {"σz_0": (np.linspace(-1, 0, 20), 0.05 * np.ones(20)),
                      "xx": (np.linspace(0, 1, 20), None)},
                     target=1.3),
        plot_thermal(tmp_path / "thermal2.png", np.linspace(0.5, 5, 20),
                     {"σz_0": (np.linspace(-1, 0, 20), None)}, target={"σz_0": -0.5}),
        plot_versus_size(tmp_path / "size.png", [8, 10, 12, 14],
                         {"d_eff": ([10, 40, 160, 640], [1, 4, 16, np.nan]),
                          "exact": ([11, 39, 150, np.nan], None)},
                         logy=True, fit={"fit a + sL": ([8, 16], [10, 10 * 4**4])},
                         xlabel="chain length L"),
    ]
    for p in out:
        assert isinstance(p, Path) and p.exists()
        _assert_png(p)
        assert not p.with_name(p.name + ".tmp").exists()
    assert matplotlib.get_backend() == backend_before
    assert dict(matplotlib.rcParams) == rc_before  # no style leak


def test_plot_relaxation_needs_curves(tmp_path):
    with pytest.raises(ValueError):
        plot_relaxation(tmp_path / "x.png", [0, 1], {})
    assert not (tmp_path / "x.png").exists()


# ----------------------------------------------------------------------------- HTML
def test_report_html(tmp_path):
    img = plot_survival(tmp_path / "survival.png", np.linspace(0, 5, 50),
                        np.exp(-np.linspace(0, 5, 50)))
    sections = [
        Section(
            heading="Equilibration <of> A & B",
            images=["survival.png", "nonexistent.png"],
            table=[
                ("d_eff", 1234.5678, 12.3),
                ("σ_A²", 1.23456e-7, "bound holds"),
                ("sector dimension", 924),
                ("<script>", "x&y"),
            ],
            paragraphs=["Assumes a <chaotic> model & broad LDOS."],
        ),
        Section(heading="Numbers only", table=[("E", float("nan"))]),
    ]
    path = write_report(tmp_path / "report.html", title="Run <L=12> & more", sections=sections)
    text = path.read_text(encoding="utf-8")
    assert "<title>Run &lt;L=12&gt; &amp; more</title>" in text
    assert "Equilibration &lt;of&gt; A &amp; B" in text
    assert "&lt;script&gt;" in text and "<script>" not in text
    assert "x&amp;y" in text and "&lt;chaotic&gt;" in text
    assert "1235 ± 12" in text
    assert "1.235×10^-7" in text and "bound holds" in text
    assert ">924<" in text and "n/a" in text
    assert text.count("data:image/png;base64,") == 1
    assert "image not found" in text and "nonexistent.png" in text
    assert "http://" not in text and "https://" not in text  # no external assets
    # the embedded image is the real file
    import base64
    start = text.index("data:image/png;base64,") + len("data:image/png;base64,")
    blob = base64.b64decode(text[start:text.index('"', start)])
    assert blob == img.read_bytes()
    # moving the page keeps the images
    moved = tmp_path / "elsewhere" / "r.html"
    moved.parent.mkdir()
    path.rename(moved)
    assert "data:image/png;base64," in moved.read_text(encoding="utf-8")


def test_number_formatting():
    assert format_number(0.123456789) == "0.1235"
    assert format_number(3) == "3"
    assert format_number(float("nan")) == "n/a"
    assert format_number(2.5e-12) == "2.5×10^-12"
    assert format_value_error(1.23456, 0.0123) == "1.235 ± 0.012"
    assert format_value_error(0.5, 0.0) == "0.5"
    assert format_number(1 - 2j) == "1 - 2i"


# ----------------------------------------------------------------------------- progress
def test_progress_disabled_when_not_tty(monkeypatch):
    monkeypatch.delenv("LARGEQ_PROGRESS", raising=False)
    stream = io.StringIO()  # not a terminal
    assert progress_enabled(stream=stream) is False
    with progress_bar(10, "work", stream=stream) as bar:
        assert bar.enabled is False
        bar.update(3)
        bar.set_postfix({"err": 1e-9})
    assert stream.getvalue() == "" and bar.n == 3

    monkeypatch.setenv("LARGEQ_PROGRESS", "1")
    assert progress_enabled(stream=stream) is True
    with progress_bar(10, "forced", stream=stream) as bar:
        bar.update(10)
        bar.set_postfix({"t": 1.5})
    out = stream.getvalue()
    assert "forced" in out and "10/10" in out

    monkeypatch.setenv("LARGEQ_PROGRESS", "0")

    class FakeTTY(io.StringIO):
        def isatty(self):
            return True

    assert progress_enabled(stream=FakeTTY()) is False
    assert progress_enabled(True, stream=FakeTTY()) is True
    monkeypatch.delenv("LARGEQ_PROGRESS")
    assert progress_enabled(stream=FakeTTY()) is True
