"""Benchmark cases of the policy-update and off-policy kernels.

- ``vtrace`` float32 at (T, N) = (2048, 64) and (10000, 1000) against the
  reverse loop over T (vectorised across streams) a trainer would write in
  NumPy;
- ``clipped_surrogate`` float32 on 10^6 elements against the NumPy
  expression of the loss, its gradient and the diagnostics.

Targets: at least 30x the NumPy references, and within 2x of the memory
floor (bytes read + written / NumPy copy bandwidth of the same run) at the
large sizes. Timings are reported, never asserted.
"""

from __future__ import annotations

from typing import Any

import numpy as np

import rollscan

from .harness import Case

TARGET = ">= 30x NumPy; <= 2x memory floor at the large sizes"


def numpy_vtrace(blp, tlp, r, v, term, boot, gamma, lam, rho_bar, c_bar):
    """V-trace targets and pg advantages: elementwise NumPy plus the reverse
    loop over T for the recurrence (Espeholt et al. 2018, section 4.1)."""
    ratio = np.exp(tlp - blp)
    rho = np.minimum(rho_bar, ratio)
    c = lam * np.minimum(c_bar, ratio)
    notdone = 1.0 - term.astype(r.dtype)
    v_below = np.concatenate([v[1:], boot[None]])
    vp = v_below * notdone
    delta = rho * (r + gamma * vp - v)
    coef = gamma * c * notdone
    corr = np.empty_like(r)
    acc = np.zeros(r.shape[1:], r.dtype)
    for t in range(r.shape[0] - 1, -1, -1):
        acc = delta[t] + coef[t] * acc
        corr[t] = acc
    vs = v + corr
    corr_below = np.concatenate([corr[1:], np.zeros_like(corr[:1])])
    pg = rho * (r + gamma * (vp + notdone * corr_below) - v)
    return vs, pg


def numpy_surrogate(new, old, adv, clip):
    """Schulman et al. 2017, eq. 7, its gradient and the diagnostics in NumPy."""
    log_r = new - old
    r = np.exp(log_r)
    s1 = r * adv
    s2 = np.clip(r, 1 - clip, 1 + clip) * adv
    n = new.size
    loss = -np.minimum(s1, s2).mean()
    grad = np.where(s2 < s1, 0.0, -s1 / n).astype(new.dtype)
    kl = ((r - 1) - log_r).mean()
    frac = (np.abs(r - 1) > clip).mean()
    return loss, grad, kl, frac, r.mean(), r.max()


def _case(**kw: Any) -> Case:
    # Older harness versions have no `target` field.
    if "target" not in getattr(Case, "__dataclass_fields__", {}):
        kw.pop("target", None)
    return Case(**kw)


def cases(quick: bool) -> list[Case]:
    rng = np.random.default_rng(2027)
    out: list[Case] = []
    gamma, lam = 0.99, 1.0
    sizes = [(2048, 64)] if quick else [(2048, 64), (10000, 1000)]
    for t_len, n in sizes:
        f = np.float32
        blp = rng.uniform(-2.0, 0.0, size=(t_len, n)).astype(f)
        tlp = (blp + rng.normal(scale=0.3, size=(t_len, n))).astype(f)
        r = rng.normal(size=(t_len, n)).astype(f)
        v = rng.normal(size=(t_len, n)).astype(f)
        term = rng.random((t_len, n)) < 0.01
        boot = rng.normal(size=n).astype(f)
        o1, o2 = np.empty_like(r), np.empty_like(r)
        elems = t_len * n

        def run(blp=blp, tlp=tlp, r=r, v=v, term=term, boot=boot):
            return rollscan.vtrace(blp, tlp, r, v, term, gamma=gamma, lam=lam, bootstrap=boot)

        def run_out(blp=blp, tlp=tlp, r=r, v=v, term=term, boot=boot, o1=o1, o2=o2):
            return rollscan.vtrace(
                blp, tlp, r, v, term, gamma=gamma, lam=lam, bootstrap=boot, out=(o1, o2)
            )

        def ref(blp=blp, tlp=tlp, r=r, v=v, term=term, boot=boot):
            return numpy_vtrace(blp, tlp, r, v, term, boot, gamma, lam, 1.0, 1.0)

        out.append(
            _case(
                group="vtrace f32",
                name=f"({t_len}, {n})",
                run=run,
                refs={"numpy loop": ref},
                # 4 float32 inputs + 1 bool flag read, 2 float32 outputs written.
                bytes_moved=elems * (4 * 4 + 1 + 2 * 4),
                fresh_out_bytes=elems * 2 * 4,
                run_out=run_out,
                target=TARGET,
            )
        )

    n = 10**5 if quick else 10**6
    old = rng.uniform(-3.0, -0.5, size=n).astype(np.float32)
    new = (old + rng.normal(scale=0.2, size=n)).astype(np.float32)
    adv = rng.normal(size=n).astype(np.float32)
    g = np.empty_like(new)
    out.append(
        _case(
            group="clipped_surrogate f32",
            name=f"{n:.0e} elements",
            run=lambda: rollscan.clipped_surrogate(new, old, adv, clip=0.2),
            refs={"numpy expr": lambda: numpy_surrogate(new, old, adv, 0.2)},
            # 3 float32 inputs read, the float32 gradient written.
            bytes_moved=n * 4 * 4,
            fresh_out_bytes=n * 4,
            run_out=lambda: rollscan.clipped_surrogate(new, old, adv, clip=0.2, out=g),
            target=TARGET,
        )
    )
    return out
