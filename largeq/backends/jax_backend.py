"""jax accelerator backend: the matrix-free Pauli-sum product and the Chebyshev engines in jax.

Importing this module imports jax but changes none of its settings.  Every entry point (the operator,
the propagators, the moments, the mesh) first calls :func:`enable_x64`, which switches on 64-bit arrays
for the process (``jax.config.update("jax_enable_x64", True)``): without it basis states and indices
would be int32 and every float64 request would silently become float32.  Callers that mix their own jax
code with largeq's can call :func:`enable_x64` explicitly and early.

Product (the "pull" form, one gather per x_mask group, no scatter)::

    (H v)[i] = d(b_i) v[i] + sum_{x != 0} f_x(b_i ^ x) v[index(b_i ^ x)]
    f_x(s)   = sum_k c'_k (-1)^{popcount(z_k & ~s)}          (c' = phase coefficient)
    index(s) = block_offset[s >> n_lo] + lo_rank[s & (2^n_lo - 1)]

with ``b_i`` the basis state of row ``i`` (one int64 array on the device, computed once), the
diagonal ``d`` precomputed on the device once, and ``s`` dropped (coefficient 0) when it lies
outside the basis (wrong number of up spins).  Everything is vectorised over the rows inside
one ``jax.jit``; ``jax.lax.population_count`` gives the signs.

Sharding: rows are split over a 1-d device mesh (``NamedSharding(mesh, P(axis))``).  The
gather reads source amplitudes anywhere in the vector, so each product first all-gathers the
input vector (``jax.shard_map`` with ``lax.all_gather(..., tiled=True)``) and then every device
computes its own rows with no further communication; the output keeps the row sharding.
Elementwise updates and inner products outside the product run in jax's global view on the
sharded arrays (XLA inserts the all-reduce of a ``vdot``).  When the dimension is not a
multiple of the device count the vectors are padded with zeros internally
(:meth:`JaxPauliOperator.to_device` / :meth:`JaxPauliOperator.from_device`).

Engines here (:func:`evolve_jax`, :func:`chebyshev_moments_jax`) reproduce
``largeq.engines.propagate.evolve`` (method "chebyshev", block = 1) and
``largeq.engines.kpm.chebyshev_moments`` step for step: same coefficients, same expansion
orders, same recursion, so float64 results agree with the numba path to rounding.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from functools import partial
from typing import Any, Callable

import numpy as np

import jax
import jax.numpy as jnp
from jax import lax
from jax.sharding import Mesh, NamedSharding, PartitionSpec

from largeq.basis.spaces import Basis
from largeq.engines.bounds import SpectralBounds, spectral_bounds
from largeq.engines.chebyshev import chebyshev_scale
from largeq.engines.propagate import EvolutionStats, _validate_common, chebyshev_coefficients
from largeq.model.pauli import PauliSum

__all__ = ["JaxPauliOperator", "evolve_jax", "chebyshev_moments_jax", "chebyshev_step_jax", "make_mesh",
           "enable_x64"]


def enable_x64() -> None:
    """Switch jax to 64-bit arrays for this process (idempotent; called by every entry point here)."""
    if not jax.config.jax_enable_x64:
        jax.config.update("jax_enable_x64", True)

#: above this many off-diagonal x_mask groups the product loops over groups with
#: ``lax.fori_loop`` instead of unrolling them in the traced program (compile time)
MAX_UNROLLED_GROUPS = 64

_AXIS = "rows"


def make_mesh(n_devices: int | None = None, axis: str = _AXIS) -> Mesh:
    """A 1-d mesh over the first ``n_devices`` jax devices (all of them when None)."""
    enable_x64()
    devs = jax.devices()
    n = len(devs) if n_devices is None else int(n_devices)
    if not 1 <= n <= len(devs):
        raise ValueError(f"n_devices: got {n_devices!r}; {len(devs)} jax device(s) available")
    # Auto axis type: XLA's partitioner places reductions and slices; the product itself is an
    # explicit shard_map
    return jax.make_mesh((n,), (axis,), axis_types=(jax.sharding.AxisType.Auto,), devices=devs[:n])


def _auto(mesh: Mesh) -> Mesh:
    """The same devices and axis name with the Auto axis type (explicit-mode meshes refuse the
    slices that drop the padding)."""
    return Mesh(mesh.devices, mesh.axis_names, axis_types=(jax.sharding.AxisType.Auto,))


def _resolve_sharding(sharding) -> tuple[Mesh | None, str | None]:
    if sharding is None:
        return None, None
    if isinstance(sharding, bool):
        return (make_mesh(), _AXIS) if sharding else (None, None)
    if isinstance(sharding, (int, np.integer)):
        return make_mesh(int(sharding)), _AXIS
    if isinstance(sharding, Mesh):
        if len(sharding.axis_names) != 1:
            raise ValueError(f"sharding: a 1-d mesh is needed, got axes {sharding.axis_names}")
        return _auto(sharding), sharding.axis_names[0]
    if isinstance(sharding, NamedSharding):
        spec = tuple(sharding.spec)
        if len(sharding.mesh.axis_names) != 1 or len(spec) != 1 or spec[0] != sharding.mesh.axis_names[0]:
            raise ValueError("sharding: a NamedSharding over a 1-d mesh with PartitionSpec(axis) is needed")
        return _auto(sharding.mesh), spec[0]
    raise ValueError(f"sharding: got {sharding!r}; allowed: None, True, a device count, a 1-d jax Mesh "
                     "or a NamedSharding(mesh, PartitionSpec(axis))")


@dataclass(frozen=True)
class _Spec:
    """Static (hashable) description of the product; the arrays travel separately."""

    n_lo: int
    n_hi: int
    up_spins: int  # -1: full space
    padded: bool
    groups: tuple  # ((x, (z, ...), (c, ...)), ...) when unrolled, else ()
    loop_groups: int  # number of groups held as arrays (fori_loop path), else 0
    real: bool
    mesh: Any
    axis: Any


def _sign(z, s, rdtype):
    """(-1)^{popcount(z & ~s)} as a float array."""
    bit = lax.population_count(z & ~s) & 1
    return (1 - 2 * bit).astype(rdtype)


def _group_term(spec: _Spec, t, states, xfull, x, zs, cs, rdtype):
    """f_x(b ^ x) v[index(b ^ x)] for every row b (0 where b ^ x leaves the basis)."""
    src = states ^ x
    ok = None
    if spec.up_spins >= 0:
        ok = lax.population_count(src) == spec.up_spins
    if spec.padded:  # padded rows hold state -1, so src < 0 there
        pad_ok = src >= 0
        ok = pad_ok if ok is None else ok & pad_ok
    hi = (src >> spec.n_lo) & ((1 << spec.n_hi) - 1)
    lo = src & ((1 << spec.n_lo) - 1)
    idx = t["block_offset"].at[hi].get(mode="promise_in_bounds") + t["lo_rank"].at[lo].get(mode="promise_in_bounds")
    coef = None
    for z, c in zip(zs, cs):
        term = c * _sign(z, src, rdtype)
        coef = term if coef is None else coef + term
    if ok is not None:
        idx = jnp.where(ok, idx, 0)
        coef = jnp.where(ok, coef, 0)
    return coef * xfull.at[idx].get(mode="promise_in_bounds")


def _local_product(spec: _Spec, t, states, diag, xfull, xloc):
    """Rows ``states`` of H x, reading sources from the full vector ``xfull``."""
    rdtype = diag.real.dtype
    y = diag * xloc
    for x, zs, cs in spec.groups:
        cs = tuple(jnp.asarray(c, dtype=diag.dtype) for c in cs)
        y = y + _group_term(spec, t, states, xfull, x, zs, cs, rdtype)
    if spec.loop_groups:
        gx, gz, gc = t["gx"], t["gz"], t["gc"]
        n_str = gz.shape[1]

        def body(g, y):
            zs = tuple(gz[g, k] for k in range(n_str))
            cs = tuple(gc[g, k] for k in range(n_str))
            return y + _group_term(spec, t, states, xfull, gx[g], zs, cs, rdtype)

        y = lax.fori_loop(0, spec.loop_groups, body, y)
    return y


def _hx(spec: _Spec, t, x):
    """H x for a (padded, possibly sharded) vector x."""
    if spec.mesh is None:
        return _local_product(spec, t, t["states"], t["diag"], x, x)
    P = PartitionSpec
    row, rep = P(spec.axis), P()
    names = sorted(k for k in t if k not in ("states", "diag"))

    def local(states, diag, xloc, *rest):
        tt = dict(zip(names, rest))
        xfull = lax.all_gather(xloc, spec.axis, tiled=True)
        return _local_product(spec, tt, states, diag, xfull, xloc)

    f = jax.shard_map(local, mesh=spec.mesh, in_specs=(row, row, row) + (rep,) * len(names), out_specs=row)
    return f(t["states"], t["diag"], x, *(t[k] for k in names))


@partial(jax.jit, static_argnums=0)
def _matvec(spec, t, x):
    return _hx(spec, t, x)


@partial(jax.jit, static_argnums=(0, 1))
def _fused(spec, use_y, t, x, y, alpha, beta, gamma):
    out = alpha * _hx(spec, t, x) + beta * x
    if use_y:
        out = out + gamma * y
    return out


@jax.jit
def _diagonal(states, zs, cs, padded_mask):
    rdtype = jnp.real(cs).dtype

    def body(k, d):
        return d + cs[k] * _sign(zs[k], states, rdtype)

    d = lax.fori_loop(0, zs.shape[0], body, jnp.zeros(states.shape, cs.dtype))
    return jnp.where(padded_mask, jnp.zeros((), cs.dtype), d)


class JaxPauliOperator:
    """A Pauli sum on a two-level basis, applied matrix-free with jax (CPU, GPU or TPU).

    Parameters
    ----------
    pauli : PauliSum
    basis : Basis
        Full space or magnetization sector; strings leaving the basis are dropped (projected),
        as in :class:`largeq.operators.PauliOperator`.
    dtype : complex128 (default) or complex64
        Working precision.  complex64 is an opt-in for memory/speed on accelerators: products
        agree with float64 to ~1e-7 relative (see docs/backends.md).
    sharding : None, True, int, jax.sharding.Mesh or NamedSharding
        None: one device.  True / n: rows split over all / the first n devices (1-d mesh).
    unroll : bool or None
        True: one traced gather per x_mask group (XLA fuses them into one pass over the rows:
        fastest products, longer compile); False: ``lax.fori_loop`` over the groups (short
        compile, the output is re-read once per group).  None: unroll up to
        ``MAX_UNROLLED_GROUPS`` groups.

    Attributes
    ----------
    shape : (D, D)
    dtype : numpy.dtype
        Dtype of the matrix elements, like the numba operator: float64 (float32) for an operator
        with real matrix elements, complex128 (complex64) otherwise.
    padded_dim : int
        Internal vector length (D rounded up to a multiple of the device count).

    Notes
    -----
    Device memory: the basis states (8 bytes per row), the diagonal (8 or 16 bytes per row),
    the two lookup tables (O(2^(L/2))), plus the vectors.  A sharded product also holds one
    all-gathered copy of the input vector on every device.

    ``A @ v``, :meth:`matvec`, :meth:`fused_update` and :meth:`expectation` accept numpy or jax
    arrays; numpy in gives numpy out (and :meth:`fused_update` then writes ``y`` in place, so the
    numpy engines, e.g. :func:`largeq.engines.bounds.spectral_bounds`, work with this operator),
    jax in gives jax out (functional: the new ``y`` is returned).
    """

    def __init__(self, pauli: PauliSum, basis: Basis, *, dtype=np.complex128, sharding=None,
                 unroll: bool | None = None):
        enable_x64()
        if pauli.n_sites != basis.n_sites:
            raise ValueError(f"operator has {pauli.n_sites} sites but the basis has {basis.n_sites}")
        cdtype = np.dtype(dtype)
        if cdtype not in (np.dtype(np.complex128), np.dtype(np.complex64)):
            raise ValueError(f"dtype: got {dtype!r}; allowed: numpy.complex128 (default) or numpy.complex64")
        pauli = pauli.simplify()
        self.pauli = pauli
        self.basis = basis
        self.precision = cdtype
        self.hermitian = pauli.is_hermitian()
        real = pauli.is_real()
        rdtype = np.dtype(np.float64 if cdtype == np.complex128 else np.float32)
        self.dtype = rdtype if real else cdtype
        self.shape = (int(basis.dim), int(basis.dim))
        self.ndim = 2
        self.mesh, self.axis = _resolve_sharding(sharding)
        n_dev = 1 if self.mesh is None else int(self.mesh.devices.size)
        self.n_devices = n_dev
        dim = int(basis.dim)
        self.padded_dim = -(-dim // n_dev) * n_dev
        padded = self.padded_dim != dim

        groups = pauli.groups()
        diag_z, diag_c = groups.pop(0, (np.zeros(0, np.int64), np.zeros(0, np.complex128)))
        keys = sorted(groups)
        conv = (lambda c: float(np.real(c))) if real else complex
        loop = len(keys) > MAX_UNROLLED_GROUPS if unroll is None else not unroll
        unrolled = () if loop else tuple(
            (int(x), tuple(int(z) for z in groups[x][0]), tuple(conv(c) for c in groups[x][1])) for x in keys)
        self._spec = _Spec(n_lo=basis.n_lo, n_hi=basis.n_hi, up_spins=-1 if basis.up_spins is None else int(basis.up_spins),
                           padded=padded, groups=unrolled, loop_groups=len(keys) if loop else 0, real=real,
                           mesh=self.mesh, axis=self.axis)
        vdt = self.dtype
        rep = self._placement(replicated=True)
        t = {
            "block_offset": jax.device_put(np.asarray(basis.block_offset, np.int64), rep),
            "lo_rank": jax.device_put(np.asarray(basis.lo_rank, np.int64), rep),
        }
        if loop:
            n_str = max(groups[x][0].size for x in keys)
            gz = np.zeros((len(keys), n_str), np.int64)
            gc = np.zeros((len(keys), n_str), vdt)
            for g, x in enumerate(keys):
                zs, cs = groups[x]
                gz[g, :zs.size] = zs
                gc[g, :cs.size] = np.real(cs) if real else cs
            t["gx"] = jax.device_put(np.array(keys, np.int64), rep)
            t["gz"] = jax.device_put(gz, rep)
            t["gc"] = jax.device_put(gc, rep)
        states = np.full(self.padded_dim, -1, np.int64)
        states[:dim] = basis.states()
        rows = self._placement()
        t["states"] = jax.device_put(states, rows)
        del states
        dc = np.real(diag_c) if real else diag_c
        if dc.size == 0:  # no diagonal strings (e.g. a pure x field)
            diag_z, dc = np.zeros(1, np.int64), np.zeros(1, vdt)
        t["diag"] = _diagonal(t["states"], jnp.asarray(np.asarray(diag_z, np.int64)), jnp.asarray(dc.astype(vdt)),
                              t["states"] < 0)
        self._t = t

    # ------------------------------------------------------------------ placement
    def _placement(self, replicated: bool = False):
        if self.mesh is None:
            return None  # jax's default device
        return NamedSharding(self.mesh, PartitionSpec() if replicated else PartitionSpec(self.axis))

    @property
    def vector_sharding(self):
        """Sharding of internal (padded) vectors: a NamedSharding, or None on one device."""
        return None if self.mesh is None else NamedSharding(self.mesh, PartitionSpec(self.axis))

    def vector_dtype(self, v_dtype) -> np.dtype:
        """dtype of ``A @ v`` for a vector of dtype ``v_dtype`` (precision capped at the operator's)."""
        kind_complex = np.iscomplexobj(np.empty(0, v_dtype)) or np.iscomplexobj(np.empty(0, self.dtype))
        if self.precision == np.complex64:
            return np.dtype(np.complex64 if kind_complex else np.float32)
        return np.dtype(np.complex128 if kind_complex else np.float64)

    def to_device(self, v, dtype=None):
        """A device copy of ``v`` (length D or padded_dim), padded with zeros and sharded like the rows."""
        arr = v if isinstance(v, jax.Array) else np.asarray(v)
        if arr.ndim != 1 or arr.shape[0] not in (self.shape[0], self.padded_dim):
            raise ValueError(f"vector must have shape ({self.shape[0]},), got {arr.shape}")
        dt = self.vector_dtype(arr.dtype) if dtype is None else np.dtype(dtype)
        if arr.shape[0] != self.padded_dim:
            xp = jnp if isinstance(arr, jax.Array) else np
            arr = xp.concatenate([arr.astype(dt), xp.zeros(self.padded_dim - arr.shape[0], dt)])
        if isinstance(arr, jax.Array):
            arr = arr.astype(dt)
            return arr if self.mesh is None else jax.device_put(arr, self.vector_sharding)
        return jax.device_put(np.ascontiguousarray(arr, dtype=dt), self._placement())

    def from_device(self, v):
        """The first D entries (drops the padding); stays a jax array."""
        return v if v.shape[0] == self.shape[0] else v[: self.shape[0]]

    def table_bytes(self) -> int:
        """Device memory held by the operator (states, diagonal, tables)."""
        return int(sum(a.nbytes for a in self._t.values()))

    # ------------------------------------------------------------------ products
    def _check_len(self, v, name):
        if getattr(v, "ndim", None) != 1 or v.shape[0] not in (self.shape[0], self.padded_dim):
            raise ValueError(f"{name} must have shape ({self.shape[0]},), got {getattr(v, 'shape', None)}")

    def apply(self, x):
        """H x for a jax vector of length D or padded_dim (jax array out, same length)."""
        self._check_len(x, "x")
        xd = self.to_device(x)
        y = _matvec(self._spec, self._t, xd)
        return y if x.shape[0] == self.padded_dim else self.from_device(y)

    def matvec(self, x):
        """H x; numpy in -> numpy out, jax in -> jax out.  2-d input: one product per column."""
        if getattr(x, "ndim", None) == 2:
            cols = [self.matvec(x[:, j]) for j in range(x.shape[1])]
            return jnp.stack(cols, axis=1) if isinstance(x, jax.Array) else np.column_stack(cols)
        if isinstance(x, jax.Array):
            return self.apply(x)
        x = np.asarray(x)
        return np.asarray(self.from_device(self.apply(x)))

    def __matmul__(self, x):
        return self.matvec(x)

    def dot(self, x):
        return self.matvec(x)

    def fused_update(self, x, y, alpha=1.0, beta=0.0, gamma=0.0):
        """``alpha * (H x) + beta * x + gamma * y`` (y is ignored when gamma == 0).

        jax arrays: returns the new y (functional).  numpy arrays: also writes the result into
        ``y`` in place (the numba operator's protocol) and returns ``y``.
        """
        self._check_len(x, "x")
        self._check_len(y, "y")
        if x is y:
            raise ValueError("fused_update: x and y must be distinct")
        need = self.vector_dtype(x.dtype)
        is_np = isinstance(y, np.ndarray)
        if is_np and np.dtype(y.dtype) != need:
            raise TypeError(f"fused_update: output dtype {y.dtype} cannot hold the result ({need})")
        for name, s in (("alpha", alpha), ("beta", beta), ("gamma", gamma)):
            if not np.iscomplexobj(np.empty(0, need)) and np.imag(s) != 0:
                raise TypeError(f"fused_update: complex {name} needs a complex output vector")
        sc = (lambda s: jnp.asarray(s, dtype=need)) if np.iscomplexobj(np.empty(0, need)) else (
            lambda s: jnp.asarray(np.real(s), dtype=need))
        use_y = bool(gamma != 0)
        xd = self.to_device(x, need)
        yd = self.to_device(y, need) if use_y else xd
        out = _fused(self._spec, use_y, self._t, xd, yd, sc(alpha), sc(beta), sc(gamma))
        if is_np:
            y[...] = np.asarray(self.from_device(out))
            return y
        return out if x.shape[0] == self.padded_dim else self.from_device(out)

    def expectation(self, v):
        """<v|H|v> (v not necessarily normalised): float for a Hermitian operator, else complex."""
        self._check_len(v, "v")
        vd = self.to_device(v)
        val = complex(jnp.vdot(vd, _matvec(self._spec, self._t, vd)))  # reuses the product's compile
        return val.real if self.hermitian else val

    def __repr__(self) -> str:
        where = "1 device" if self.mesh is None else f"{self.n_devices} devices"
        return (f"JaxPauliOperator(dim={self.shape[0]:,}, dtype={self.dtype}, {len(self.pauli)} strings, "
                f"{where}, {self.basis.kind})")


# ---------------------------------------------------------------------- Chebyshev propagation
def _pad_len(n: int, quantum: int = 32) -> int:
    return -(-n // quantum) * quantum


@partial(jax.jit, static_argnums=0)
def _cheb_step(spec, t, psi, coeffs, order, a, b):
    """sum_{n < order} coeffs[n] T_n((H - b)/a) psi, and its norm (order >= 2).

    One loop, one product call site (compile time): n = 1 makes phi_1 = Ht psi, n >= 2 makes
    phi_n = 2 Ht phi_{n-1} - phi_{n-2}.
    """
    rdt = a.dtype

    def body(n, carry):
        prev, cur, out = carry
        first = n == 1
        alpha = jnp.where(first, 1.0 / a, 2.0 / a).astype(rdt)
        beta = jnp.where(first, -b / a, -2.0 * b / a).astype(rdt)
        g = jnp.where(first, 0.0, -1.0).astype(rdt)
        new = alpha * _hx(spec, t, cur) + beta * cur + g * prev
        return cur, new, out + coeffs[n] * new

    _, _, out = lax.fori_loop(1, order, body, (psi, psi, coeffs[0] * psi))
    return out, jnp.sqrt(jnp.vdot(out, out).real)


def chebyshev_step_jax(op: JaxPauliOperator, psi, dt: float, bounds: SpectralBounds, tol: float = 1e-10):
    """exp(-i H dt) psi for a device vector ``psi`` (padded length), with the numba path's coefficients.

    Returns (new psi, its norm, order, error bound); the order is that of
    :func:`largeq.engines.propagate.chebyshev_coefficients` (``order - 1`` products).
    """
    enable_x64()
    c, err = chebyshev_coefficients(float(dt), bounds, tol)
    order = len(c)
    cdt = op.precision
    if order == 1:
        out = psi * jnp.asarray(c[0], cdt)
        return out, float(jnp.sqrt(jnp.vdot(out, out).real)), order, err
    cp = np.zeros(_pad_len(order), cdt)
    cp[:order] = c
    rdt = np.float64 if cdt == np.complex128 else np.float32
    out, nrm = _cheb_step(op._spec, op._t, psi, jnp.asarray(cp), jnp.asarray(order, np.int32),
                          jnp.asarray(bounds.half_width, rdt), jnp.asarray(bounds.center, rdt))
    return out, float(nrm), order, err


def evolve_jax(op: JaxPauliOperator, psi0, times, bounds: SpectralBounds | None = None, tol: float = 1e-10,
               on_output: Callable[[int, float, Any], None] | None = None, *, start_index: int = 0,
               progress: Callable[[int, int], None] | None = None, emit_start: bool = True,
               to_host: bool = False) -> EvolutionStats:
    """Chebyshev propagation on the jax backend: ``psi(t_i) = exp(-i H (t_i - t_start)) psi0``.

    Same contract and numbers as ``largeq.engines.propagate.evolve(op, psi0, times,
    method="chebyshev", block=1, ...)``: one expansion per output interval with the order of
    :func:`~largeq.engines.propagate.chebyshev_coefficients`, ``on_output(i, t, psi)`` at every
    output index in order, the same norm-drift check and the same :class:`EvolutionStats`.

    Parameters
    ----------
    op : JaxPauliOperator (Hermitian)
    psi0 : numpy or jax array, shape (D,)
    times : strictly increasing 1-d array (inverse energy units)
    bounds : SpectralBounds, optional
        Computed with :func:`largeq.engines.bounds.spectral_bounds` on ``op`` when None.
    tol : float, error allowed per step relative to the norm
    on_output : callable(i, t, psi), optional
        ``psi`` is an (immutable) jax array of length D on the device(s); with ``to_host=True`` a
        read-only numpy array instead (one device-to-host copy per output).
    start_index, progress, emit_start : as in ``evolve``.

    Notes
    -----
    Device vectors held: state, two recursion vectors, the accumulated result (+ the all-gathered
    input on each device when sharded).  The norm check allows ``2 tol + 1e-9`` relative drift
    in complex128 and ``max(2 tol + 1e-9, 1e-4)`` in complex64 (float32 rounding).
    """
    enable_x64()
    t_start = time.perf_counter()
    if not isinstance(op, JaxPauliOperator):
        raise ValueError(f"op must be a JaxPauliOperator, got {type(op)!r}")
    times, start_index = _validate_common(op, np.asarray(psi0), times, tol, start_index, on_output, progress)
    if bounds is None:
        bounds = spectral_bounds(op)
    elif not isinstance(bounds, SpectralBounds):
        raise ValueError(f"bounds must be a SpectralBounds or None, got {type(bounds)!r}")
    if not (bounds.half_width > 0 and np.isfinite(bounds.half_width)):
        raise ValueError(f"bounds must have a finite positive width, got {bounds!r}")
    drift_tol = 2 * tol + 1e-9
    if op.precision == np.complex64:
        drift_tol = max(drift_tol, 1e-4)

    def emit(i, psi):
        if on_output is None:
            return
        v = op.from_device(psi)
        if to_host:
            v = np.asarray(v)
            v.flags.writeable = False
        on_output(i, float(times[i]), v)

    state = op.to_device(psi0, op.precision)
    norm0 = float(jnp.sqrt(jnp.vdot(state, state).real))
    if emit_start:
        emit(start_index, state)
    matvecs, orders, errs = 0, [], []
    for i in range(start_index, times.size - 1):
        state, nk, order, err = chebyshev_step_jax(op, state, times[i + 1] - times[i], bounds, tol)
        matvecs += order - 1
        orders.append(order)
        errs.append(err)
        if abs(nk - norm0) > drift_tol * norm0:
            raise RuntimeError(
                f"norm drifted from {norm0!r} to {nk!r} at output index {i + 1}: the spectral bounds "
                f"[{bounds.e_min}, {bounds.e_max}] probably do not contain the spectrum of op")
        emit(i + 1, state)
        if progress is not None:
            progress(i + 1, times.size - 1)
    steps = len(orders)
    return EvolutionStats(
        method="chebyshev",
        matvecs=int(matvecs),
        orders=tuple(int(o) for o in orders),
        steps=steps,
        substeps=steps,
        wall_seconds=time.perf_counter() - t_start,
        max_error_estimate=float(max(errs, default=0.0)),
        total_error_estimate=float(sum(errs)),
        vectors_held=4 if steps else 1,
        bounds=bounds,
    )


# ---------------------------------------------------------------------- KPM moments
@partial(jax.jit, static_argnums=0)
def _kpm(spec, t, v, n_moments, mu_buffer, a, b):
    """Moments into ``mu_buffer`` (length >= n_moments + 1, a bucket size, so one compile serves
    many n_moments); one product per iteration, one call site."""
    rdt = a.dtype
    mu0 = jnp.vdot(v, v).real.astype(jnp.float64)

    def body(n, carry):  # cur = phi_n, prev = phi_{n-1}
        prev, cur, mu, mu1 = carry
        first = n == 0
        mu = mu.at[2 * n].set(2.0 * jnp.vdot(cur, cur).real - mu0)  # n = 0: 2 mu0 - mu0 = mu0 exactly
        alpha = jnp.where(first, 1.0 / a, 2.0 / a).astype(rdt)
        beta = jnp.where(first, -b / a, -2.0 * b / a).astype(rdt)
        g = jnp.where(first, 0.0, -1.0).astype(rdt)
        new = alpha * _hx(spec, t, cur) + beta * cur + g * prev
        m = jnp.vdot(cur, new).real.astype(jnp.float64)
        mu1 = jnp.where(first, m, mu1)
        mu = mu.at[2 * n + 1].set(jnp.where(first, m, 2.0 * m - mu1))
        return cur, new, mu, mu1

    prev, cur, mu, _ = lax.fori_loop(0, n_moments // 2, body, (v, v, mu_buffer, mu0))
    # odd n_moments: the last moment mu_{2m} = 2 <phi_m|phi_m> - mu_0 needs no product
    last = jnp.where(n_moments % 2 == 1, 2.0 * jnp.vdot(cur, cur).real - mu0, mu[n_moments - 1])
    return mu.at[n_moments - 1].set(last)


def chebyshev_moments_jax(op: JaxPauliOperator, v, n_moments: int, bounds, *, eps: float = 0.01) -> np.ndarray:
    """KPM moments ``mu_n = <v|T_n(Ht)|v>``, n < n_moments, on the jax backend.

    Same definition, rescaling (:func:`largeq.engines.kpm.chebyshev_scale`) and recursion as
    :func:`largeq.engines.kpm.chebyshev_moments`: two moments per product
    (``mu_2n = 2<phi_n|phi_n> - mu_0``, ``mu_2n+1 = 2<phi_n+1|phi_n> - mu_1``), ``n_moments // 2``
    products.  A real vector with a real operator stays real.  Returns float64 numpy moments.
    """
    enable_x64()
    if isinstance(n_moments, bool) or int(n_moments) != n_moments or n_moments < 2:
        raise ValueError(f"n_moments must be an integer >= 2, got {n_moments!r}")
    if not isinstance(op, JaxPauliOperator):
        raise ValueError(f"op must be a JaxPauliOperator, got {type(op)!r}")
    a, b = chebyshev_scale(bounds, eps)
    vd = op.to_device(v)
    rdt = np.float64 if op.precision == np.complex128 else np.float32
    n_moments = int(n_moments)
    buf = jnp.zeros(_pad_len(n_moments + 1, 64), jnp.float64)
    mu = _kpm(op._spec, op._t, vd, jnp.asarray(n_moments, np.int32), buf, jnp.asarray(a, rdt), jnp.asarray(b, rdt))
    return np.asarray(mu, dtype=np.float64)[:n_moments]
