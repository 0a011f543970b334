"""Facts of deployment: no writable numba cache, and concurrent threads.

Each case runs in a fresh interpreter, because numba reads its cache and
threading settings once per process.
"""

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.jit_only

SMOKE = textwrap.dedent(
    """
    import sparseindex
    from sparseindex import Codes, Store
    from sparseindex._numba import config as _config
    codes = Codes.random(500, 128, 12, seed=1)
    store = Store(128, threshold=6, seed=2)
    store.add(codes)
    assert store.query(codes[3]).ids[0] == 3
    assert store.query_many(codes[:20])[5].ids[0] == 5
    print(_config.cache_mode)
    """
)


def run(code: str, **env) -> subprocess.CompletedProcess:
    full_env = {**os.environ, "PYTHONPATH": str(ROOT)}
    full_env.pop("NUMBA_DISABLE_JIT", None)
    full_env.update(env)
    return subprocess.run([sys.executable, "-c", code], env=full_env, capture_output=True, text=True, timeout=600)


def test_import_survives_no_cache_location():
    """numba finds no writable cache location: compile without a cache, never fail."""
    # ZipCacheLocator alone finds no location for a plain source file, which
    # is what numba reports for read-only site-packages without a home.
    result = run(SMOKE, NUMBA_CACHE_LOCATOR_CLASSES="ZipCacheLocator")
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip().splitlines()[-1] == "off"


def test_falls_back_to_a_private_temporary_cache(tmp_path):
    """No in-tree or home cache, but a cache folder can be set: use it."""
    result = run(
        SMOKE,
        NUMBA_CACHE_LOCATOR_CLASSES="ZipCacheLocator,UserProvidedCacheLocator",
        TMPDIR=str(tmp_path),
    )
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip().splitlines()[-1] == "temporary"
    assert any(tmp_path.glob("sparseindex-numba-*/**/*.nbi"))


def test_parallel_kernels_from_many_threads_under_workqueue():
    """With the workqueue layer, concurrent parallel sections would abort: they are serialised."""
    code = textwrap.dedent(
        """
        import threading
        from sparseindex import Codes, Store
        codes = Codes.random(3000, 256, 16, seed=1)
        store = Store(256, threshold=5, sample_size=10, detectors=2, seed=2)
        store.add(codes)
        want = [store.query_many(codes[i * 50:(i + 1) * 50]) for i in range(8)]
        want_near = store.nearest(codes[7], 5)
        errors = []
        def work(k):
            try:
                for rep in range(15):
                    got = store.query_many(codes[k * 50:(k + 1) * 50])
                    assert all(a == b for a, b in zip(got, want[k]))
                    assert store.nearest(codes[7], 5) == want_near
                    assert store.query(codes[k]).ids[0] == k
            except Exception as exc:
                errors.append(repr(exc))
        threads = [threading.Thread(target=work, args=(k,)) for k in range(8)]
        for t in threads: t.start()
        for t in threads: t.join()
        import numba
        print(numba.threading_layer(), len(errors), errors[:1])
        """
    )
    result = run(code, NUMBA_THREADING_LAYER="workqueue")
    assert result.returncode == 0, result.stderr[-2000:]
    layer, n_errors = result.stdout.split()[:2]
    assert layer == "workqueue" and n_errors == "0", result.stdout


def test_plain_python_kernels_sample_exactly_like_compiled_ones():
    """The NUMBA_DISABLE_JIT twins of the random stream give the same detector samples."""
    code = textwrap.dedent(
        """
        from sparseindex import Codes, Store
        store = Store(300, threshold=2, sample_size=7, detectors=3, seed=2**63 + 12345)
        store.add(Codes.random(5, 300, 40, seed=9))
        print([store.detector_bits(i).tolist() for i in range(5)])
        """
    )
    compiled = run(code)
    plain = run(code, NUMBA_DISABLE_JIT="1")
    assert compiled.returncode == 0 and plain.returncode == 0, compiled.stderr + plain.stderr
    assert compiled.stdout == plain.stdout


def test_public_names_survive_importing_their_submodules():
    """Importing a submodule never shadows a public name (the function and its module have different names)."""
    code = textwrap.dedent(
        """
        import sparseindex
        import sparseindex.near_duplicates, sparseindex.health
        from sparseindex.near_duplicates import planted_duplicates
        print(callable(sparseindex.label_near_duplicates), type(sparseindex.near_duplicates).__name__,
              sparseindex.Health.__name__, sparseindex.FalseHitMeasurement.__name__)
        """
    )
    result = run(code)
    assert result.returncode == 0, result.stderr[-2000:]
    assert result.stdout.split() == ["True", "module", "Health", "FalseHitMeasurement"]


def test_numba_loads_on_the_first_kernel_call_and_every_kernel_is_swapped_in():
    """``import sparseindex`` leaves numba unimported; the first call puts real dispatchers everywhere."""
    code = textwrap.dedent(
        """
        import sys
        import sparseindex
        assert "numba" not in sys.modules, "import sparseindex imported numba"
        from sparseindex import Codes, Store, model
        from sparseindex.near_duplicates import banding as _banding
        from sparseindex._numba import kernels as _kernels
        from sparseindex._numba import unionfind as _unionfind
        from sparseindex._numba import banding as _banding_kernels, usage as _usage_kernels
        store = Store(64, threshold=2, seed=0)
        store.add([[1, 2, 3], [2, 3, 4]])
        assert store.query([2, 3]).ids.tolist() == [0, 1]
        import numba
        from numba.core.registry import CPUDispatcher
        for module in (_kernels, _banding, _banding_kernels, _unionfind, _usage_kernels, model):
            left = [k for k, v in vars(module).items() if type(v).__name__ == "_Deferred"]
            assert not left, (module.__name__, left)
        assert isinstance(_kernels.query_one, CPUDispatcher)
        assert _banding_kernels.rows_overlap is _kernels.rows_overlap  # imported by name, swapped too
        assert _banding.gather_matches is _banding_kernels.gather_matches
        assert isinstance(_banding.gather_matches, CPUDispatcher)
        assert _kernels.prange is numba.prange and _banding_kernels.prange is numba.prange
        print("ok")
        """
    )
    result = run(code)
    assert result.returncode == 0, result.stderr[-2000:]
    assert result.stdout.split() == ["ok"]
