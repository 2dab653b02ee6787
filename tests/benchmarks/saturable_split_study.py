"""A numerical study (not a product path): how many steps a split of the saturable variant needs.

The benchmark's saturable variant (scenarios/benchmark_patch.toml with ``vmax = 0.1 mg/h`` and
``km = 2e-5 mg/mL`` on central, an invented scenario) is linear but for the central
compartment's Michaelis-Menten elimination. RODAS4 on all states spends about two thirds of its
steps in the first hour after each patch replacement (the diffusion transient that the jump
starts in the outer layer's cells; the step grows like 0.13 t there), which is linear and needs
no integrator at all. This study splits the state as

    y = y_lin + z,    z = V_S a + s_F u(c),    u(c) = -vmax c / ((km + c) V_central),

* ``y_lin``: the exact solution of the linear network (the elimination left out) from the
  state after each event, by the eigen-decomposition of its matrix L;
* ``a``: the amplitudes of the slow modes of L (|lambda| <= CUT), a' = Lambda_S a + beta_S u(c),
  integrated by RODAS4 (Hairer and Wanner, *Solving Ordinary Differential Equations II*, 2nd ed.,
  1996, sec. IV.7, non-autonomous form with the d_i coefficients of their code RODAS);
* ``s_F u(c)``: the fast modes by their static response (modal truncation with a static
  correction, the mode-acceleration idea of structural dynamics; common practice, e.g. Craig
  and Kurdila, *Fundamentals of Structural Dynamics*, 2nd ed., 2006, ch. 11; from memory),
  exact at steady state; what it leaves out is bounded by max|u'| |sum_F phi beta / lambda^2|;
* ``c = c_lin + V_S[c] a + s_F[c] u(c)``: one scalar equation, solved by Newton;
* at every event the state jumps and the split is made again: z's static part from the new c,
  y_lin = y - z (the exact linear solution carries the fast modes' decay after the jump).

Error control as the product's RODAS4: the larger of the root mean square over all states and the
largest over the compartments, rtol 3e-6, atol 3e-9 times each state's scale. The errors are
against scipy's Radau at rtol 1e-11 on the same grid (the benchmark contract: central within
1e-5 of its peak, cumulative absorbed within 1e-6 of its final value).

Dense linear algebra in numpy: this measures steps and accuracy, not time.

Usage: ``.venv/bin/python tests/benchmarks/saturable_split_study.py``
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import scipy.linalg as sl
from scipy.integrate import solve_ivp

sys.path.insert(0, str(Path(__file__).resolve().parent))
from run_benchmark import HandModel, Variant  # noqa: E402

from barrierflow.engine.rosenbrock import COEF  # noqa: E402

STAGE_TIMES = np.array([0.0, 0.386, 0.21, 0.63, 1.0, 1.0])  # c_i of RODAS (method 1)
STAGE_D = np.array([0.25, -0.1043, 0.1035, -0.0362, 0.0, 0.0])  # d_i of RODAS (method 1)
GAMMA = 0.25


def reference(hand: HandModel, times: np.ndarray, event) -> np.ndarray:
    """Radau at rtol 1e-11, restarting at each event."""
    out = np.empty((len(times), hand.n))
    y = hand.y0()
    for k in range(7):
        t0, t1 = 24.0 * k, 24.0 * (k + 1)
        y = event(y, k)
        sel = np.flatnonzero((times >= t0) & ((times < t1) | (k == 6)))
        te = times[sel]
        sol = solve_ivp(hand.rhs, (t0, t1), y, method="Radau", rtol=1e-11, atol=1e-16, jac=hand.jac,
                        t_eval=te if te[-1] == t1 else np.append(te, t1))
        out[sel] = sol.y.T[:len(te)]
        y = sol.y[:, -1].copy()
    return out


def split_run(hand: HandModel, times: np.ndarray, event, scale: np.ndarray, cut: float, rtol: float = 3e-6):
    """The split described in the module docstring; returns (states at ``times``, steps, slow modes,
    bound of what the static correction leaves out at central, mg/mL)."""
    ic, n = hand.ic, hand.n
    atol = 3e-9 * scale
    lin = hand.jac_const.toarray()
    lin[ic, ic] += hand.vmax / hand.km / hand.v_central  # the elimination's part at c = 0 taken out
    lam, vec = np.linalg.eig(lin)
    lam, vec = lam.real, vec.real
    inv = np.linalg.inv(vec)
    o = np.argsort(-lam)
    lam, vec, inv = lam[o], vec[:, o], inv[o]
    slow = np.abs(lam) <= cut
    fast = ~slow
    beta = inv[:, ic]
    stat_f = -(vec[:, fast] * (beta[fast] / lam[fast])).sum(axis=1)
    rest_f = (vec[:, fast] * (beta[fast] / lam[fast] ** 2)).sum(axis=1)
    s_f = stat_f[ic]
    v_s, l_s, b_s = vec[:, slow], lam[slow], beta[slow]
    k = int(slow.sum())
    vmax, km, vc = hand.vmax, hand.km, hand.v_central

    def u_of(c):
        return -vmax * c / (km + abs(c)) / vc

    def du(c):
        return -vmax * km / (km + abs(c)) ** 2 / vc

    def solve_c(c_lin, z_s):
        c = c_lin + z_s
        for _ in range(50):
            dc = (c - c_lin - z_s - s_f * u_of(c)) / (1.0 - s_f * du(c))
            c -= dc
            if abs(dc) <= 1e-15 * abs(c):
                break
        return c

    ca, cc, cd = COEF
    out = np.empty((len(times), n))
    a = np.zeros(k)
    y = hand.y0()
    h = 1e-3
    steps = 0
    u_rate = 0.0
    for kk in range(7):
        t0, t1 = 24.0 * kk, 24.0 * (kk + 1)
        y = event(y, kk)
        z = v_s @ a + stat_f * u_of(y[ic])  # the split made again at the event
        b = inv @ (y - z)

        def y_lin(t, b=b):
            return vec @ (np.exp(lam * t) * b)

        def rates(t, a_, b=b):
            yl = y_lin(t, b)
            c = solve_c(yl[ic], v_s[ic] @ a_)
            return l_s * a_ + b_s * u_of(c), c, yl

        sel = np.flatnonzero((times >= t0) & ((times < t1) | (kk == 6)))
        t_loc = times[sel] - t0
        io, t, h_acc, e_acc = 0, 0.0, 0.0, 0.0
        span = t1 - t0
        while t < span:
            if t + 1.0001 * h >= span:
                h = span - t
            _, c, yl = rates(t, a)
            g = du(c) / (1.0 - s_f * du(c))
            jac = np.diag(l_s) + np.outer(b_s, v_s[ic]) * g
            f_t = b_s * g * (lin @ yl)[ic]
            while True:
                fac = 1.0 / (h * GAMMA)
                lu = sl.lu_factor(fac * np.eye(k) - jac)
                ks = np.zeros((6, k))
                for i in range(6):
                    stage = a + sum(ca[i, j] * ks[j] for j in range(i))
                    rhs = (rates(t + STAGE_TIMES[i] * h, stage)[0] + sum(cc[i, j] / h * ks[j] for j in range(i))
                           + h * STAGE_D[i] * f_t)
                    ks[i] = sl.lu_solve(lu, rhs)
                a_new = a + sum(ca[5, j] * ks[j] for j in range(5)) + ks[5]
                sk = atol + rtol * np.maximum(abs(y_lin(t) + v_s @ a), abs(y_lin(t + h) + v_s @ a_new))
                q = (v_s @ ks[5]) / sk
                err = max(np.sqrt(np.mean(q * q)), abs(q[0]), abs(q[ic]), abs(q[hand.ip]))
                fac_h = max(1 / 6, min(5.0, err ** 0.25 / 0.9))
                if err <= 1.0:
                    if h_acc > 0:
                        fac_h = max(fac_h, max(1 / 6, min(5.0, h_acc / h * (err * err / e_acc) ** 0.25 / 0.9)))
                    h_acc, e_acc = h, max(1e-2, err)
                    break
                h /= fac_h
            while io < len(t_loc) and t_loc[io] <= t + h + 1e-12:
                th = (t_loc[io] - t) / h
                c2, c3 = cd[0] @ ks[:5], cd[1] @ ks[:5]
                a_o = a + th * ((a_new - a) + (1 - th) * (c2 + th * c3))
                _, c_o, yl_o = rates(t_loc[io], a_o)
                out[sel[io]] = yl_o + v_s @ a_o + stat_f * u_of(c_o)
                io += 1
            u_rate = max(u_rate, abs(u_of(rates(t + h, a_new)[1]) - u_of(c)) / h)
            a, t = a_new, t + h
            steps += 1
            h = min(h / fac_h, span)
        _, c_end, yl = rates(span, a)
        y = yl + v_s @ a + stat_f * u_of(c_end)
    return out, steps, k, u_rate * abs(rest_f[ic])


def main() -> None:
    times = np.arange(1009) / 6.0
    print("split of the saturable variant: steps and errors against Radau rtol 1e-11 (the product's RODAS4 "
          "on all states takes 903 steps on the 50-cell case, central error 8.4e-7)")
    for cells, bolus in ((50, 0.0), (50, 0.5), (20, 0.5)):
        hand = HandModel(Variant("s", cells=cells, saturable=True))
        ic = hand.ic

        def event(y, k, bolus=bolus, hand=hand):
            y = y.copy()
            if k > 0:
                y[0] = 10.0  # the daily fresh patch
            y[hand.ic] += bolus / hand.v_central  # an invented daily bolus into central
            return y

        ref = reference(hand, times, event)
        bound = 70.0 + 7 * bolus  # mg: what the run brings (the product's amount bound)
        scale = np.r_[bound, np.where(hand.k > 1, 10 * bound, bound), bound / 5000.0, bound / 20000.0, bound]
        for cut in (10.0, 100.0):
            out, steps, k, rest = split_run(hand, times, event, scale, cut)
            c_ref, a_ref = ref[:, ic], ref[:, hand.ia]
            print(f"  {cells} cells a layer, bolus {bolus:g} mg/day, modes |lambda| <= {cut:g}/h: {k} of {hand.n - 1}; "
                  f"{steps} steps; central err {np.max(np.abs(out[:, ic] - c_ref)) / c_ref.max():.1e}; "
                  f"absorbed err {np.max(np.abs(out[:, hand.ia] - a_ref)) / a_ref[-1]:.1e}; "
                  f"every state {np.max(np.abs(out - ref) / scale):.1e} of its scale; static correction's "
                  f"bound at central {rest / c_ref.max():.1e} of the peak")


if __name__ == "__main__":
    main()
