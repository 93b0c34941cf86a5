"""The self-consistent expansion history: a fixed point over history -> propagator ->
closure -> background (DESIGN 2.6).

Unknown: the spectator source s = (rho_q, p_q) on the e-fold grid (M_p^4). One pass maps a
source to a history (the background solver), the history to its propagator (A, A', A'',
..., by the method the caller chose), and that to a new source (the closure):

    s_{k+1} = F(s_k) = closure(propagator(background(s_k))).

The iteration stops when max_N |ln H_{k+1} - ln H_k| < tolerance (default 1e-10). Plain
(damped) iteration or Anderson acceleration (type II, memory m; Walker & Ni 2011, SIAM J.
Numer. Anal. 49, 1715) act on s scaled by the total density of the first history, so the
mixing is in units where delta ln H ~ delta s / 2.

Calibration (one closure parameter theta so that H0 or Omega_q today hits a target) is
solved jointly with the fixed point: within each pass the propagator is that of the
current history, and theta is the root of rho_q(today; theta) = rho_q* by Newton's method
(in ln theta for positive parameters), where rho_q* follows exactly from the first
Friedmann equation today (a = 1 is fixed by T_CMB, so radiation and matter today do not
depend on the spectator): H0 target rho_q* = 3 H0^2 - rho_other(0); fraction target
rho_q* = Omega/(1 - Omega) rho_other(0). History and parameter converge together; there is
no root finder wrapped around the fixed point.

Sensitivity of the target to the parameter (uncalibrated, at the solved value): by the
implicit function theorem at the fixed point u* = F(u*, theta),

    du*/dtheta = (I - F_u)^{-1} F_theta,    dT/dtheta = T_u du*/dtheta,

where F is one pass (background -> propagator -> closure) and T(u) the target read off the
history of u. In adjoint form dT/dtheta = w^T F_theta with (I - F_u)^T w = T_u^T: one
reverse-mode linearization of the pass at the fixed point (jax.vjp through the background
and the closure) and GMRES with its pullback as the matrix-vector product, so the gradient
includes the history's response, not only the closure's direct dependence on theta. The
propagator's jet is held at its fixed-point value in that linearization: differentiating
the exact mode sum in reverse mode inside the solve would multiply its compile time many
times over, and the memory's response to a change of the history is of the order of the
contraction factor of the passes (reported with the sensitivity; 1e-14 in the demo).

Everything is written as one jit-able, vmap-able ``lax.while_loop`` (lanes that have
converged keep their state); progress goes out through a host callback.
"""

from __future__ import annotations

import enum
from collections.abc import Callable

import equinox as eqx

from ._jax import jax, jnp
from .background import ExpansionModel, History, expansion_history, today_node
from .closures import Closure, ClosureInput, ClosureOutput, conservation_slope

__all__ = [
    "FAULT_STAGES",
    "FixedPoint",
    "SolverSettings",
    "Status",
    "Target",
    "closure_input",
    "solve_fixed_point",
    "status_message",
]


class Status(enum.IntEnum):
    """Outcome of the fixed point."""

    CONVERGED = 0
    MAX_PASSES = 1
    NOT_FINITE = 2
    DIVERGING = 3
    CALIBRATION_FAILED = 4


_MESSAGES = {
    Status.CONVERGED: "converged",
    Status.MAX_PASSES: "did not converge within solver.max_passes passes: raise solver.max_passes, "
    "or try solver.acceleration = 'picard' with solver.damping < 1",
    Status.NOT_FINITE: "a pass produced NaN or Inf",
    Status.DIVERGING: "the fixed point is diverging (the residual grew in consecutive passes): "
    "the spectator's feedback on the history is too strong for this closure; lower its coupling "
    "or use solver.acceleration = 'picard' with solver.damping < 1",
    Status.CALIBRATION_FAILED: "calibration failed: no value of the closure's parameter gives the "
    "target (the spectator would need a negative or unreachable energy density today)",
}


#: Stages of a pass, in the order they run, as ``FixedPoint.fault_stage`` indexes them.
FAULT_STAGES = ("propagator", "closure", "background")


def _first_bad(*arrays):
    """(any non-finite, first grid node where one is) over arrays shaped (..., n)."""
    bad = jnp.zeros(arrays[0].shape[-1], dtype=bool)
    for a in arrays:
        bad = bad | jnp.any(~jnp.isfinite(a.reshape(-1, a.shape[-1])), axis=0)
    return jnp.any(bad), jnp.argmax(bad)


def status_message(status: int) -> str:
    return _MESSAGES[Status(int(status))]


class SolverSettings(eqx.Module):
    tolerance: float = eqx.field(static=True, default=1e-10)
    max_passes: int = eqx.field(static=True, default=30)
    acceleration: str = eqx.field(static=True, default="anderson")
    memory: int = eqx.field(static=True, default=3)
    damping: float = eqx.field(static=True, default=1.0)


class Target(eqx.Module):
    """Calibration target: ``kind`` "H0" (``value`` = H0 in M_p) or "fraction_spectator"."""

    value: jax.Array
    kind: str = eqx.field(static=True, default="H0")


class FixedPoint(eqx.Module):
    """The solved history and everything behind it.

    ``history``: the last background solution; ``propagator``: the propagator of the
    history before it (they differ by less than the tolerance); ``closure``: with the
    calibrated parameter; ``output``: rho_q, p_q, validity; ``residuals``: max |delta ln H|
    of every pass (NaN after the last); ``friedmann2``: max_N |eps - (3/2)(1 + p/rho)| with
    eps from the first Friedmann equation differentiated (every component's own rho');
    ``sensitivity``: d ln(target)/d ln|theta| at the solved theta, through the fixed point
    (NaN without calibration); ``contraction``:
    last residual over the one before (an upper estimate of the fixed point's rate);
    ``fault_stage``, ``fault_node``: where a NaN/Inf first appeared in the failing pass
    (stage index into ``FAULT_STAGES``, grid node; -1 when none did).
    """

    history: History
    propagator: dict
    closure: Closure
    output: ClosureOutput
    passes: jax.Array
    residuals: jax.Array
    status: jax.Array
    friedmann2: jax.Array
    sensitivity: jax.Array
    contraction: jax.Array
    fault_stage: jax.Array
    fault_node: jax.Array


def _epsilon_slope(history: History):
    """d eps/dN at the nodes of a history (its ln H is the Hermite interpolant with slopes
    -eps, the same curve the propagator sees), by forward-mode differentiation."""
    from .propagator import spline_from_history

    sp = spline_from_history(history)
    return jax.vmap(jax.grad(lambda n: sp.ln_hubble_and_epsilon(n)[1]))(history.efolds)


def closure_input(history: History, prop: dict, needs_third: bool = False) -> ClosureInput:
    """The closure's view of a history and its propagator (M_p units)."""
    d3 = prop.get("d3A") if needs_third else None
    if needs_third and d3 is None:
        raise ValueError("this closure needs A''' but the propagator method does not provide it")
    return ClosureInput(
        prop["A"], prop["dA"], prop["d2A"], d3, history.ln_hubble, history.epsilon, _epsilon_slope(history)
    )


def _target_density(history: History, i0: int, target: Target):
    other = (
        history.rho_radiation[i0] + history.rho_matter[i0] + history.rho_lambda[i0] + history.rho_inflaton[i0]
    )
    if target.kind == "H0":
        return 3.0 * target.value**2 - other, other
    return target.value / (1.0 - target.value) * other, other


def _slice(x: ClosureInput, i0: int) -> ClosureInput:
    return jax.tree_util.tree_map(lambda a: a[i0 : i0 + 1], x)


_NEWTON_STEPS = 60


def _calibrate(closure: Closure, x: ClosureInput, history: History, i0: int, target: Target):
    """theta with rho_q(today; theta) = rho_q*: Newton, in ln theta for positive parameters."""
    want, _ = _target_density(history, i0, target)
    x0 = _slice(x, i0)
    positive = closure.parameter_positive

    def rho(theta):
        return closure.with_parameter(theta)(x0).density[0]

    def g(v):
        if positive:
            return jnp.log(jnp.abs(rho(jnp.exp(v)))) - jnp.log(jnp.abs(want))
        return rho(v) / want - 1.0

    theta0 = closure.parameter()
    v0 = jnp.log(jnp.abs(theta0)) if positive else theta0

    def step(_, v):
        val, slope = jax.jvp(g, (v,), (jnp.ones_like(v),))
        dv = -val / slope
        dv = jnp.clip(dv, -10.0, 10.0) if positive else dv
        return jnp.where(jnp.isfinite(dv), v + dv, v)

    v = jax.lax.fori_loop(0, _NEWTON_STEPS, step, v0)
    theta = jnp.exp(v) if positive else v
    ok = (want > 0.0) & (jnp.abs(g(v)) < 1e-10) & jnp.isfinite(theta)
    if positive:
        ok = ok & (rho(theta) > 0.0)
    return closure.with_parameter(theta), ok


def _target_of(history: History, i0: int, target: Target):
    """ln T of a history: ln H0, or ln Omega_q0 for the fraction target."""
    if target.kind == "H0":
        return history.ln_hubble[i0]
    return jnp.log(history.rho_spectator[i0]) - jnp.log(history.rho_total[i0])


_GMRES_TOL = 1e-12
_GMRES_SIZE = 30


def _gmres(matvec, b, tol: float, size: int):
    """x with |matvec(x) - b| <= tol |b| by GMRES (Saad & Schultz 1986, SIAM J. Sci. Stat.
    Comput. 7, 856) without restarts: Arnoldi with twice-applied Gram-Schmidt on at most
    ``size`` Krylov vectors, stopping at the first that meets the tolerance.

    Written here rather than taken from jax.scipy because that one wraps the solve in
    lax.custom_linear_solve, which must linearize ``matvec``; a matvec that is itself the
    pullback of checkpointed ODE solves (diffrax) cannot be linearized again.
    """
    n = b.shape[0]
    beta = jnp.linalg.norm(b)
    basis = jnp.zeros((size + 1, n), b.dtype).at[0].set(b / jnp.where(beta > 0, beta, 1.0))
    hess = jnp.zeros((size + 1, size), b.dtype)
    e1 = jnp.zeros(size + 1, b.dtype).at[0].set(beta)

    def small_solve(hess):
        y = jnp.linalg.lstsq(hess, e1)[0]
        return y, jnp.linalg.norm(hess @ y - e1)

    def cond(c):
        k, _, _, res = c
        return (k < size) & (res > tol * beta)

    def body(c):
        k, basis, hess, _ = c
        w = matvec(basis[k])
        mask = (jnp.arange(size + 1) <= k).astype(b.dtype)
        h = (basis @ w) * mask
        w = w - h @ basis
        h2 = (basis @ w) * mask  # second pass: orthogonal to round-off
        w = w - h2 @ basis
        h = h + h2
        norm = jnp.linalg.norm(w)
        h = h.at[k + 1].set(norm)
        basis = basis.at[k + 1].set(w / jnp.where(norm > 0, norm, 1.0))
        hess = hess.at[:, k].set(h)
        return k + 1, basis, hess, small_solve(hess)[1]

    init = (jnp.asarray(0), basis, hess, beta)
    _, basis, hess, _ = jax.lax.while_loop(cond, body, init)
    y, _ = small_solve(hess)
    return y @ basis[:size]


def _sensitivity(model, closure, prop, rho_ref, u_star, i0: int, target: Target):
    """d ln T/d ln|theta| through the fixed point, in reverse mode (module docstring):
    (I - F_u)^T w = T_u^T by GMRES on the transposed linearized pass, then
    d ln T/d theta = w^T F_theta. The pass is linearized with the propagator jet ``prop``
    held at its fixed-point value (the history still enters the closure through H, eps and
    eps_N, and the target through the background); the neglected memory response is of the
    order of the contraction factor of the passes, reported beside it. Reverse mode because
    the background's ODE solves (checkpointed adjoints) support it."""
    theta = closure.parameter()

    def pass_and_target(u, th):
        hist = expansion_history(model, u[0] * rho_ref, u[1] * rho_ref)
        cl = closure.with_parameter(th)
        out = cl(closure_input(hist, prop, cl.needs_third))
        return jnp.stack([out.density, out.pressure]) / rho_ref, _target_of(hist, i0, target)

    _, pullback = jax.vjp(pass_and_target, u_star, theta)
    zero_u = jnp.zeros_like(u_star)
    one = jnp.ones((), dtype=u_star.dtype)
    t_u = pullback((zero_u, one))[0]
    shape = u_star.shape

    def matvec(wf):
        w = wf.reshape(shape)
        return (w - pullback((w, jnp.zeros_like(one)))[0]).reshape(-1)

    w = _gmres(matvec, t_u.reshape(-1), _GMRES_TOL, _GMRES_SIZE).reshape(shape)
    d_target = pullback((w, jnp.zeros_like(one)))[1]
    return d_target * theta


def _select(done, old, new):
    return jax.tree_util.tree_map(lambda a, b: jnp.where(done, a, b), old, new)


def solve_fixed_point(
    model: ExpansionModel,
    closure: Closure,
    propagate: Callable[[History], dict],
    settings: SolverSettings = SolverSettings(),
    target: Target | None = None,
    *,
    start: History | None = None,
    source=None,
    progress: Callable | None = None,
) -> FixedPoint:
    """Iterate history -> propagator -> closure -> history to the self-consistent solution.

    ``model``: the background (M_p units); ``closure``: a :class:`~backreact.closures.Closure`;
    ``propagate``: a jit-traceable map from a History to the propagator dict ("A", "dA",
    "d2A", ... in M_p units at the history's nodes); ``target``: optional calibration;
    ``source``: the starting (rho_q, p_q) on the grid (M_p^4; default zero) and ``start``
    its history ``expansion_history(model, *source)`` if the caller has it already (it
    saves compiling the background twice); ``progress``: called on the host as
    progress(pass, residual) after every pass.
    """
    n = model.size
    i0 = today_node(model)
    m = settings.memory
    if source is None:
        source = (jnp.zeros(n), jnp.zeros(n))
    source = (jnp.asarray(source[0]), jnp.asarray(source[1]))
    hist0 = expansion_history(model, *source) if start is None else start
    rho_ref = jax.lax.stop_gradient(hist0.rho_total - hist0.rho_spectator)
    u0 = jnp.stack(source) / rho_ref

    def one_pass(cl, hist):
        prop = propagate(hist)
        x = closure_input(hist, prop, cl.needs_third)
        ok = jnp.asarray(True)
        if target is not None:
            cl, ok = _calibrate(cl, x, hist, i0, target)
        out = cl(x)
        return prop, x, cl, out, ok

    shapes = jax.eval_shape(one_pass, closure, hist0)
    zeros = jax.tree_util.tree_map(lambda s: jnp.zeros(s.shape, s.dtype), shapes)
    prop_z, x_z, _, out_z, _ = zeros

    state = {
        "k": jnp.asarray(0),
        "u": u0,
        "hist": hist0,
        "prop": prop_z,
        "x": x_z,
        "closure": closure,
        "out": out_z,
        "res": jnp.full((settings.max_passes,), jnp.nan),
        "dU": jnp.zeros((m, 2 * n)),
        "dF": jnp.zeros((m, 2 * n)),
        "u_prev": jnp.zeros(2 * n),
        "f_prev": jnp.zeros(2 * n),
        "status": jnp.asarray(int(Status.MAX_PASSES)),
        "done": jnp.asarray(False),
        "fault": jnp.asarray([-1, -1]),
    }

    def body(st):
        k = st["k"]
        prop, x, cl, out, ok = one_pass(st["closure"], st["hist"])
        g = jnp.stack([out.density, out.pressure]) / rho_ref
        u = st["u"]
        f = (g - u).reshape(-1)
        uf = u.reshape(-1)
        dU, dF = st["dU"], st["dF"]
        if settings.acceleration == "anderson":
            slot = (k - 1) % m
            have = k > 0
            dU = jnp.where(have, dU.at[slot].set(uf - st["u_prev"]), dU)
            dF = jnp.where(have, dF.at[slot].set(f - st["f_prev"]), dF)
            mask = (jnp.arange(m) < jnp.minimum(k, m)).astype(f.dtype)
            mat = (dF * mask[:, None]).T
            gamma = jnp.linalg.lstsq(mat, f)[0] * mask
            gamma = jnp.where(jnp.all(jnp.isfinite(gamma)), gamma, 0.0)
            u_new = uf + f - (dU + dF).T @ gamma
        else:
            u_new = uf + settings.damping * f
        u_new = u_new.reshape(2, n)
        # An unchanged source keeps its history bit for bit (zero coupling reproduces the
        # plain background exactly, not to the last ulp of a differently fused compile).
        hist = jax.lax.cond(
            jnp.all(u_new == u),
            lambda: st["hist"],
            lambda: expansion_history(model, u_new[0] * rho_ref, u_new[1] * rho_ref),
        )
        res = jnp.max(jnp.abs(hist.ln_hubble - st["hist"].ln_hubble))
        res_all = st["res"].at[k].set(res)
        prev1 = jnp.where(k >= 1, st["res"][jnp.maximum(k - 1, 0)], jnp.inf)
        prev2 = jnp.where(k >= 2, st["res"][jnp.maximum(k - 2, 0)], jnp.inf)
        diverging = (k >= 3) & (res > 2.0 * prev1) & (prev1 > 2.0 * prev2)
        status = jnp.select(
            [~ok, ~jnp.isfinite(res), res < settings.tolerance, diverging, k + 1 >= settings.max_passes],
            [
                int(Status.CALIBRATION_FAILED),
                int(Status.NOT_FINITE),
                int(Status.CONVERGED),
                int(Status.DIVERGING),
                int(Status.MAX_PASSES),
            ],
            default=-1,
        )
        if progress is not None:
            jax.debug.callback(progress, k + 1, res)
        new = {
            "k": k + 1,
            "u": u_new,
            "hist": hist,
            "prop": prop,
            "x": x,
            "closure": cl,
            "out": out,
            "res": res_all,
            "dU": dU,
            "dF": dF,
            "u_prev": uf,
            "f_prev": f,
            "status": jnp.where(status >= 0, status, st["status"]),
            "done": status >= 0,
            "fault": st["fault"],
        }
        # A pass that failed (calibration impossible, NaN/Inf) keeps the last good history,
        # propagator and closure, so that what is reported and written is finite and
        # describes the state the failure was detected in.
        failed = (status == int(Status.CALIBRATION_FAILED)) | (status == int(Status.NOT_FINITE))
        checks = [
            _first_bad(*(v for v in prop.values() if jnp.issubdtype(v.dtype, jnp.floating))),
            _first_bad(g),
            _first_bad(hist.ln_hubble),
        ]
        stage = jnp.argmax(jnp.stack([c[0] for c in checks]))
        node = jnp.stack([c[1] for c in checks])[stage]
        fault = jnp.where(
            (status == int(Status.NOT_FINITE)) & jnp.any(jnp.stack([c[0] for c in checks])),
            jnp.stack([stage, node]),
            jnp.asarray([-1, -1]),
        )
        if_failed = {
            **st,
            "prop": prop,
            "x": x,
            "out": st["closure"](x),
            "k": k + 1,
            "res": res_all,
            "status": status,
            "done": True,
            "fault": fault,
        }
        new = _select(failed, if_failed, new)
        return _select(st["done"], st, new)

    st = jax.lax.while_loop(lambda s: ~s["done"], body, state)
    hist, x, cl, out = st["hist"], st["x"], st["closure"], st["out"]
    drho = conservation_slope(cl, x)
    friedmann2 = jnp.max(1.5 * jnp.abs(drho + 3.0 * (out.density + out.pressure)) / hist.rho_total)
    if target is not None:
        sens = _sensitivity(model, cl, jax.lax.stop_gradient(st["prop"]), rho_ref, st["u"], i0, target)
    else:
        sens = jnp.asarray(jnp.nan)
    k = st["k"]
    last = st["res"][jnp.maximum(k - 1, 0)]
    before = st["res"][jnp.maximum(k - 2, 0)]
    contraction = jnp.where(k >= 2, last / before, jnp.nan)
    return FixedPoint(
        hist,
        st["prop"],
        cl,
        out,
        k,
        st["res"],
        st["status"],
        friedmann2,
        sens,
        contraction,
        st["fault"][0],
        st["fault"][1],
    )
