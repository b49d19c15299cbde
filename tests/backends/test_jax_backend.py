"""The jax backend against the numba path: every engine output to 1e-12 in float64 (CPU).

Reference: the numba operator ``largeq.operators.PauliOperator`` and the numpy engines
``largeq.engines.propagate.evolve`` (Chebyshev, block = 1) and
``largeq.engines.kpm.chebyshev_moments``; both backends implement the same formulas, so any
difference beyond rounding is a bug.  Tolerances: 1e-12 relative to the scale of the compared
quantity in float64; complex64 is checked against float64 at 1e-5 (products) and 1e-4
(evolution) because float32 carries ~6e-8 relative rounding per operation, accumulated over
tens of products.
"""

from __future__ import annotations

import itertools
import json
import os
import subprocess
import sys
import textwrap
from importlib import resources
from pathlib import Path

import numpy as np
import pytest

from largeq.backends import BACKENDS, BackendUnavailable, get_backend, make_operator
from largeq.basis.spaces import full_basis, magnetization_basis
from largeq.operators.pauli_operator import PauliOperator
from largeq.model.pauli import PauliSum, pauli_string

ROOT = Path(__file__).resolve().parents[2]
TOL = 1e-12


def j1j2(L, j1=1.0, j2=0.3, d1=1.0, d2=1.0):
    """J1-J2 XXZ ring in S = sigma/2 units (real matrix elements)."""
    terms = []
    for r, J, D in ((1, j1, d1), (2, j2, d2)):
        for i in range(L):
            for letter, c in (("X", J / 4), ("Y", J / 4), ("Z", J * D / 4)):
                terms.append(pauli_string(L, {i: letter, (i + r) % L: letter}, c))
    return _sum(terms)


def chiral(L, full: bool):
    """Hermitian with complex matrix elements: Dzyaloshinskii-Moriya XY - YX bonds, z fields,
    and (full space only) x and y fields that break the magnetization."""
    rng = np.random.default_rng(7)
    terms = []
    for i in range(L - 1):
        d = float(rng.uniform(0.5, 1.0))
        terms.append(pauli_string(L, {i: "X", i + 1: "Y"}, d))
        terms.append(pauli_string(L, {i: "Y", i + 1: "X"}, -d))
        terms.append(pauli_string(L, {i: "Z", i + 1: "Z"}, 0.7))
    for i in range(L):
        terms.append(pauli_string(L, {i: "Z"}, float(rng.uniform(-1, 1))))
        if full:
            terms.append(pauli_string(L, {i: "X"}, 0.4))
            terms.append(pauli_string(L, {i: "Y"}, -0.3))
    return _sum(terms)


def _sum(terms):
    L = terms[0].n_sites
    return PauliSum(L, np.concatenate([t.x_mask for t in terms]), np.concatenate([t.z_mask for t in terms]),
                    np.concatenate([t.coeff for t in terms])).simplify()


def rel_err(a, b):
    a, b = np.asarray(a), np.asarray(b)
    return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-300))


@pytest.fixture(scope="module")
def jb():
    return pytest.importorskip("largeq.backends.jax_backend", reason="jax is an optional dependency (pip install 'jax[cpu]')")


CASES = {
    "sector-j1j2": (lambda: (j1j2(12), magnetization_basis(12, 6))),
    "sector-uneven-split": (lambda: (j1j2(11), magnetization_basis(11, 4, n_lo=3))),
    "sector-complex": (lambda: (chiral(11, False), magnetization_basis(11, 5))),
    "full-j1j2": (lambda: (j1j2(10), full_basis(10))),
    "full-complex": (lambda: (chiral(10, True), full_basis(10, n_lo=6))),
}


@pytest.fixture(scope="module", params=sorted(CASES))
def pair(request, jb):
    H, basis = CASES[request.param]()
    return PauliOperator(H, basis), jb.JaxPauliOperator(H, basis)


# ------------------------------------------------------------------------------ products
def test_matvec_real_and_complex_vectors(pair):
    nop, jop = pair
    assert jop.shape == nop.shape and np.dtype(jop.dtype) == np.dtype(nop.dtype)
    rng = np.random.default_rng(1)
    xr = rng.standard_normal(nop.shape[0])
    xc = xr + 1j * rng.standard_normal(nop.shape[0])
    for x in (xr, xc):
        ref = nop @ x
        got = jop @ x
        assert isinstance(got, np.ndarray) and got.dtype == ref.dtype
        assert rel_err(got, ref) < TOL
    # jax in -> jax out, same numbers
    import jax.numpy as jnp

    got = jop.matvec(jnp.asarray(xc))
    assert not isinstance(got, np.ndarray)
    assert rel_err(got, nop @ xc) < TOL
    assert abs(jop.expectation(xc) - nop.expectation(xc)) < TOL * abs(np.vdot(xc, xc)) * nop.pauli.norm_bound()


@pytest.mark.parametrize("case", ["sector-j1j2", "full-complex"])
def test_fused_update_semantics(jb, case):
    H, basis = CASES[case]()
    nop, jop = PauliOperator(H, basis), jb.JaxPauliOperator(H, basis)
    import jax.numpy as jnp

    rng = np.random.default_rng(2)
    n = nop.shape[0]
    x = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    y0 = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    a, b, g = 0.7 - 0.2j, -1.3, 0.5j
    ref = nop.fused_update(x, y0.copy(), a, b, g)
    # functional on jax arrays: y untouched, new y returned
    yj = jnp.asarray(y0)
    got = jop.fused_update(jnp.asarray(x), yj, a, b, g)
    assert rel_err(got, ref) < TOL and np.array_equal(np.asarray(yj), y0)
    # numpy protocol: in place, like the numba operator
    yn = y0.copy()
    assert jop.fused_update(x, yn, a, b, g) is yn and rel_err(yn, ref) < TOL
    # gamma == 0 ignores y, even NaN
    ynan = np.full(n, np.nan + 0j)
    got = jop.fused_update(jnp.asarray(x), jnp.asarray(ynan), 2.0, 0.5, 0.0)
    assert rel_err(got, nop.fused_update(x, np.empty_like(x), 2.0, 0.5, 0.0)) < TOL


def test_group_loop_path_matches(jb, monkeypatch):
    """x_mask groups through lax.fori_loop instead of unrolled: same numbers (chosen above
    MAX_UNROLLED_GROUPS groups, or with unroll=False)."""
    monkeypatch.setattr(jb, "MAX_UNROLLED_GROUPS", 3)
    for H, basis in (CASES["sector-complex"](), CASES["full-complex"]()):
        jop = jb.JaxPauliOperator(H, basis)
        assert jop._spec.loop_groups > 3 and jop._spec.groups == ()
        assert jb.JaxPauliOperator(H, basis, unroll=True)._spec.groups != ()
        x = np.random.default_rng(3).standard_normal(basis.dim) + 0.5j
        assert rel_err(jop @ x, PauliOperator(H, basis) @ x) < TOL


def _examples():
    names = sorted(p.name for p in (resources.files("largeq.scenario") / "builtin").iterdir() if p.name.endswith(".toml"))
    assert len(names) >= 4
    return names


@pytest.mark.parametrize("name", _examples())
def test_every_preset_example(jb, name):
    from largeq.operators.problem import build_problem
    from largeq.scenario.spec import load_scenario

    with resources.as_file(resources.files("largeq.scenario") / "builtin" / name) as path:
        problem = build_problem(load_scenario(path))
    psi, _ = problem.initial_vector()
    rng = np.random.default_rng(4)
    xr = rng.standard_normal(problem.basis.dim)
    H = jb.JaxPauliOperator(problem.hamiltonian, problem.basis)
    for x in (xr, psi):
        assert rel_err(H @ x, problem.operator @ x) < TOL
    assert abs(H.expectation(psi) - problem.operator.expectation(psi)) < TOL * problem.hamiltonian.norm_bound()
    for obs in problem.observables:
        A = jb.JaxPauliOperator(problem.observables[obs].pauli, problem.basis)
        ref = problem.observable_operator(obs)
        assert rel_err(A @ psi, ref @ psi) < TOL
        assert abs(A.expectation(psi) - ref.expectation(psi)) < TOL * max(1.0, problem.observables[obs].pauli.norm_bound())


# ------------------------------------------------------------------------------ engines
def _curves(evolve_fn, op, obs_ops, psi0, times, bounds):
    states, values = [], []

    def record(i, t, psi):
        psi = np.asarray(psi)
        states.append(psi.copy())
        values.append([A.expectation(psi) for A in obs_ops])

    stats = evolve_fn(op, psi0, times, bounds, 1e-12, record)
    return stats, np.array(states), np.array(values)


@pytest.mark.parametrize("name", ["neel_j1j2.toml", "ising_tilted.toml"])
def test_chebyshev_evolution_curves_match(jb, name):
    """Sector (real H) and full space (x field) runs: every output state and observable curve."""
    from largeq.operators.problem import build_problem
    from largeq.engines.bounds import spectral_bounds
    from largeq.scenario.spec import load_scenario

    with resources.as_file(resources.files("largeq.scenario") / "builtin" / name) as path:
        problem = build_problem(load_scenario(path))
    psi0, _ = problem.initial_vector()
    times = np.array([0.0, 0.3, 0.7, 1.5, 2.0, 3.2])  # non-uniform: several orders
    bounds = spectral_bounds(problem.operator)
    names = sorted(problem.observables)
    nobs = [problem.observable_operator(n) for n in names]
    ref_stats, ref_states, ref_vals = _curves(get_backend("numba").evolve_chebyshev, problem.operator, nobs, psi0,
                                              times, bounds)
    jop = make_operator(problem.hamiltonian, problem.basis, backend="jax")
    jobs = [jb.JaxPauliOperator(problem.observables[n].pauli, problem.basis) for n in names]
    stats, states, vals = _curves(jb.evolve_jax, jop, jobs, psi0, times, bounds)
    assert stats.orders == ref_stats.orders and stats.matvecs == ref_stats.matvecs
    assert len(set(stats.orders)) > 1
    assert states.shape == ref_states.shape == (times.size, problem.basis.dim)
    assert np.max(np.abs(states - ref_states)) < TOL  # states are normalised
    assert np.max(np.abs(vals - ref_vals)) < TOL * max(o.pauli.norm_bound() for o in jobs)
    assert stats.max_error_estimate == ref_stats.max_error_estimate


def test_evolve_jax_contract(jb):
    """start_index / emit_start / progress / to_host behave like evolve, and bad bounds are caught."""
    from largeq.engines.bounds import SpectralBounds, spectral_bounds
    from largeq.engines.propagate import evolve

    H, basis = CASES["sector-complex"]()
    nop, jop = PauliOperator(H, basis), jb.JaxPauliOperator(H, basis)
    psi0 = np.zeros(basis.dim, complex)
    psi0[[3, 17]] = [0.6, 0.8j]
    times = np.linspace(0.0, 1.0, 6)
    bounds = spectral_bounds(nop)
    seen, ref, prog = [], [], []
    evolve(nop, psi0, times, bounds=bounds, start_index=2, emit_start=False,
           on_output=lambda i, t, p: ref.append((i, t, p.copy())))
    jb.evolve_jax(jop, psi0, times, bounds, on_output=lambda i, t, p: seen.append((i, t, p)), start_index=2,
                  emit_start=False, to_host=True, progress=lambda i, n: prog.append((i, n)))
    assert [s[:2] for s in seen] == [r[:2] for r in ref] and prog == [(i, 5) for i in range(3, 6)]
    assert all(isinstance(s[2], np.ndarray) and not s[2].flags.writeable for s in seen)
    assert max(np.max(np.abs(s[2] - r[2])) for s, r in zip(seen, ref)) < TOL
    narrow = SpectralBounds(-0.1, 0.1, -0.1, 0.1, 0.0, 0.0, 1)
    with pytest.raises(RuntimeError, match="norm drifted"):
        jb.evolve_jax(jop, psi0, times, narrow)


@pytest.mark.parametrize("case", ["sector-uneven-split", "full-complex"])
def test_kpm_moments_match(jb, case):
    from largeq.engines.bounds import spectral_bounds
    from largeq.engines.kpm import chebyshev_moments

    H, basis = CASES[case]()
    nop, jop = PauliOperator(H, basis), jb.JaxPauliOperator(H, basis)
    bounds = spectral_bounds(nop)
    rng = np.random.default_rng(5)
    vr = rng.standard_normal(nop.shape[0])
    for v, n_moments in itertools.product((vr, vr + 1j * rng.standard_normal(nop.shape[0])), (2, 3, 40, 41)):
        ref = chebyshev_moments(nop, v, n_moments, bounds)
        got = jb.chebyshev_moments_jax(jop, v, n_moments, bounds)
        assert got.shape == (n_moments,) and got.dtype == np.float64
        assert np.max(np.abs(got - ref)) < TOL * ref[0]  # |mu_n| <= mu_0 = <v|v>


# ------------------------------------------------------------------------------ complex64
def test_complex64_opt_in_accuracy(jb):
    """float32 arithmetic: ~1e-7 measured for products, evolution and moments; checked loosely
    (1e-5 / 1e-4) since float32 rounding (6e-8 per operation) accumulates over >40 products."""
    from largeq.engines.bounds import spectral_bounds

    H, basis = CASES["sector-complex"]()
    j64 = jb.JaxPauliOperator(H, basis, unroll=False)  # short compile; unrolled path tested above
    j32 = jb.JaxPauliOperator(H, basis, dtype=np.complex64, unroll=False)
    assert j32.dtype == np.complex64
    rng = np.random.default_rng(6)
    x = rng.standard_normal(basis.dim) + 1j * rng.standard_normal(basis.dim)
    y32 = j32 @ x
    assert y32.dtype == np.complex64
    err = rel_err(y32, j64 @ x)
    assert 0 < err < 1e-5
    xr = x.real.astype(np.float32)
    assert (j32 @ xr).dtype == np.complex64  # complex matrix elements
    psi0 = x / np.linalg.norm(x)
    bounds = spectral_bounds(j64)
    times = np.linspace(0.0, 4.0, 5)
    out64, out32 = [], []
    s64 = jb.evolve_jax(j64, psi0, times, bounds, on_output=lambda i, t, p: out64.append(np.asarray(p)))
    jb.evolve_jax(j32, psi0, times, bounds, on_output=lambda i, t, p: out32.append(np.asarray(p)))
    assert s64.matvecs > 40 and out32[-1].dtype == np.complex64
    assert max(np.max(np.abs(a - b)) for a, b in zip(out32, out64)) < 1e-4
    mu64 = jb.chebyshev_moments_jax(j64, x, 30, bounds)
    mu32 = jb.chebyshev_moments_jax(j32, x, 30, bounds)
    assert np.max(np.abs(mu32 - mu64)) < 1e-4 * mu64[0]
    with pytest.raises(ValueError, match="complex128"):
        jb.JaxPauliOperator(H, basis, dtype=np.float16)


# ------------------------------------------------------------------------------ selection
def test_backend_names_and_errors():
    assert BACKENDS == ("numba", "jax")
    H, basis = j1j2(8), magnetization_basis(8, 4)
    assert isinstance(make_operator(H, basis), PauliOperator)
    with pytest.raises(ValueError, match="allowed: 'numba', 'jax'"):
        get_backend("cuda")
    with pytest.raises(ValueError, match="no options"):
        make_operator(H, basis, backend="numba", dtype=np.complex64)


def test_missing_jax_gives_install_hint(monkeypatch):
    monkeypatch.setitem(sys.modules, "jax", None)  # "import jax" now raises ImportError
    monkeypatch.delitem(sys.modules, "largeq.backends.jax_backend", raising=False)
    with pytest.raises(BackendUnavailable, match=r'pip install "largeq\[jax\]"') as info:
        make_operator(j1j2(6), full_basis(6), backend="jax")
    assert "jax" in str(info.value) and isinstance(info.value, ImportError)
    assert isinstance(make_operator(j1j2(6), full_basis(6), backend="numba"), PauliOperator)


def _run_python(code: str, env_extra: dict, timeout: float = 240) -> subprocess.CompletedProcess:
    env = dict(os.environ, **env_extra)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    return subprocess.run([sys.executable, "-c", textwrap.dedent(code)], capture_output=True, text=True, env=env,
                          timeout=timeout, cwd=ROOT)


def test_importing_largeq_does_not_import_jax():
    r = _run_python("""
        import sys, largeq, largeq.backends, largeq.operators, largeq.engines.propagate, largeq.operators.problem
        print(sorted(m for m in sys.modules if m == "jax" or m.startswith("jax.")))
    """, {})
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "[]"


# ------------------------------------------------------------------------------ sharding
SHARD_SCRIPT = """
    import json, sys
    import numpy as np
    sys.path.insert(0, "tests/backends")
    import jax
    from test_jax_backend import CASES
    from largeq.backends.jax_backend import JaxPauliOperator, evolve_jax, chebyshev_moments_jax, make_mesh
    from largeq.basis import magnetization_basis
    from largeq.engines.bounds import spectral_bounds
    from test_jax_backend import j1j2
    out = {"devices": len(jax.devices())}
    cases = {"padded": (j1j2(13), magnetization_basis(13, 5)),   # C(13,5) = 1287: odd, padded to 1288
             "full-complex": CASES["full-complex"]()}
    for name, (H, basis) in cases.items():
        # loop over groups (short compile); the sharded layer is the same for both paths
        one = JaxPauliOperator(H, basis, unroll=False)
        two = JaxPauliOperator(H, basis, sharding=make_mesh(2), unroll=False)
        rng = np.random.default_rng(8)
        x = rng.standard_normal(basis.dim) + 1j * rng.standard_normal(basis.dim)
        xd = two.to_device(x)
        yd = two.apply(xd)
        bounds = spectral_bounds(one)
        psi0 = x / np.linalg.norm(x)
        a, b = [], []
        evolve_jax(one, psi0, np.linspace(0, 2, 3), bounds, on_output=lambda i, t, p: a.append(np.asarray(p)))
        evolve_jax(two, psi0, np.linspace(0, 2, 3), bounds, on_output=lambda i, t, p: b.append(np.asarray(p)))
        m1 = chebyshev_moments_jax(one, x, 25, bounds)
        m2 = chebyshev_moments_jax(two, x, 25, bounds)
        out[name] = {
            "padded_dim": two.padded_dim, "dim": basis.dim,
            "shards": len(yd.addressable_shards), "spec": str(yd.sharding.spec),
            "state_shards": len(two._t["states"].addressable_shards),
            "matvec": float(np.max(np.abs(np.asarray(two @ x) - np.asarray(one @ x))) / np.max(np.abs(one @ x))),
            "padding_zero": float(np.max(np.abs(np.asarray(yd)[basis.dim:]), initial=0.0)),
            "evolve": float(max(np.max(np.abs(p - q)) for p, q in zip(a, b))),
            "kpm": float(np.max(np.abs(m1 - m2)) / m1[0]),
            "expect": abs(one.expectation(x) - two.expectation(x)) / abs(one.expectation(x)),
        }
    print(json.dumps(out))
"""


def test_sharded_two_virtual_devices_match_one(jb):
    """Rows split over 2 CPU devices (XLA_FLAGS in a fresh process): same numbers as one device."""
    r = _run_python(SHARD_SCRIPT, {"XLA_FLAGS": "--xla_force_host_platform_device_count=2", "JAX_PLATFORMS": "cpu"})
    assert r.returncode == 0, r.stderr[-3000:]
    res = json.loads(r.stdout.strip().splitlines()[-1])
    assert res.pop("devices") == 2
    assert res["padded"]["padded_dim"] == res["padded"]["dim"] + 1  # the odd dimension was padded
    for name, v in res.items():
        assert v["shards"] == 2 and v["state_shards"] == 2 and "rows" in v["spec"], (name, v)
        assert v["padding_zero"] == 0.0
        for key in ("matvec", "evolve", "kpm", "expect"):
            assert v[key] < TOL, (name, key, v[key])
