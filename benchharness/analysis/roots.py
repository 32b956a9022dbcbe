"""One-dimensional root finding and bounded minimisation, for the Box-Cox profile and
the studentized range quantile.

* ``brentq``: Brent's method (Brent 1973, *Algorithms for Minimization without
  Derivatives*, ch. 4): inverse quadratic interpolation or secant steps, with
  bisection whenever they would not shrink the bracket fast enough, so it never
  needs more evaluations than bisection by more than a small factor and keeps a
  sign change bracketed throughout.
* ``minimize_scalar(fun, bounds, method="bounded", options={"xatol": ...})``:
  golden-section search (Kiefer 1953) on the bracket, to the given tolerance.

They stand in for the two scipy.optimize calls the analysis made, whose package
costs a third of a second to import; the names and arguments are kept so a
module can say ``from benchharness.analysis import roots as optimize``. Tests
compare them with scipy.optimize (tests/test_dist.py).
"""

from __future__ import annotations

import math
from types import SimpleNamespace


def brentq(f, a: float, b: float, xtol: float = 2e-12, rtol: float = 8.881784197001252e-16,
           maxiter: int = 100) -> float:
    """A root of ``f`` in [a, b] (f(a) and f(b) of opposite signs), to ``xtol + rtol·|x|``."""
    xpre, xcur = float(a), float(b)
    fpre, fcur = float(f(xpre)), float(f(xcur))
    if fpre * fcur > 0:
        raise ValueError("f(a) and f(b) must have different signs")
    if fpre == 0:
        return xpre
    if fcur == 0:
        return xcur
    xblk = fblk = spre = scur = 0.0
    for _ in range(maxiter):
        if fpre != 0 and fcur != 0 and (fpre < 0) != (fcur < 0):
            xblk, fblk = xpre, fpre          # the bracket's other end
            spre = scur = xcur - xpre
        if abs(fblk) < abs(fcur):            # keep the best point in xcur
            xpre, xcur, xblk = xcur, xblk, xcur
            fpre, fcur, fblk = fcur, fblk, fcur
        delta = (xtol + rtol * abs(xcur)) / 2
        sbis = (xblk - xcur) / 2
        if fcur == 0 or abs(sbis) < delta:
            return xcur
        if abs(spre) > delta and abs(fcur) < abs(fpre):
            if xpre == xblk:                 # secant
                stry = -fcur * (xcur - xpre) / (fcur - fpre)
            else:                            # inverse quadratic interpolation
                dpre = (fpre - fcur) / (xpre - xcur)
                dblk = (fblk - fcur) / (xblk - xcur)
                stry = -fcur * (fblk * dblk - fpre * dpre) / (dblk * dpre * (fblk - fpre))
            if 2 * abs(stry) < min(abs(spre), 3 * abs(sbis) - delta):
                spre, scur = scur, stry      # the interpolation step is accepted
            else:
                spre = scur = sbis           # bisection
        else:
            spre = scur = sbis
        xpre, fpre = xcur, fcur
        xcur += scur if abs(scur) > delta else (delta if sbis > 0 else -delta)
        fcur = float(f(xcur))
    return xcur


_INVPHI = (math.sqrt(5.0) - 1.0) / 2.0


def minimize_scalar(fun, bounds, method: str = "bounded", options: dict | None = None):
    """Minimum of ``fun`` on ``bounds`` by golden-section search; ``.x`` holds it."""
    if method != "bounded":
        raise ValueError("only the bounded method is provided")
    xatol = float((options or {}).get("xatol", 1e-5))
    a, b = map(float, bounds)
    c, d = b - _INVPHI * (b - a), a + _INVPHI * (b - a)
    fc, fd = fun(c), fun(d)
    while b - a > xatol:
        if fc <= fd:
            b, d, fd = d, c, fc
            c = b - _INVPHI * (b - a)
            fc = fun(c)
        else:
            a, c, fc = c, d, fd
            d = a + _INVPHI * (b - a)
            fd = fun(d)
    x = c if fc <= fd else d
    return SimpleNamespace(x=x, fun=min(fc, fd), success=True)
