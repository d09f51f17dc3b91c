"""Stage 5, verdicts: analytic against numeric, one coordinate at a time.

Default rule (no rtol / atol given).  A coordinate agrees when

    |analytic - numeric| <= 2 * error_estimate + 1000 * eps_f * (|analytic| + terms)

error_estimate is the numeric derivative's own estimated error (truncation plus
rounding, from stencils.py).  The second part allows for rounding in the
analytic gradient itself, which is computed in floating point too and is
summed from terms that may be far larger than the result: near a minimiser
the gradient is zero but its terms are not.  `terms` estimates their size per
coordinate as the largest of: the largest numeric gradient entry, |f0| / scale,
|f2| * scale (the second derivative seen by the stencil, or a typical one
seen along the noise probe's line) and the cost's slope along that line.  eps_f is the relative precision of the cost's
values (dtype epsilon, or measured noise where that is larger).

With rtol and/or atol the rule is numpy's: agree when
|analytic - numeric| <= atol + rtol * |numeric|, a missing one counting as 0;
the error estimate is then only reported, not used.
"""
from __future__ import annotations

import numpy as np

VERDICTS = ("agree", "disagree", "kink", "noisy", "non-finite", "error")
FAILING = ("disagree", "non-finite", "error")   # verdicts that fail a report
SAFETY = 2.0
ANALYTIC_ROUNDING = 1000.0


def term_scale(numeric, f0, scale, curvature_times_scale) -> np.ndarray:
    """Size of the terms each gradient entry is made of (see module text)."""
    largest = float(np.max(np.abs(numeric[np.isfinite(numeric)]), initial=0.0))
    return np.maximum(np.maximum(largest, abs(f0) / scale), curvature_times_scale)


def allowed_difference(analytic, numeric, error, *, terms, eps_f, rtol=None, atol=None):
    """How far apart analytic and numeric may be, per coordinate (see module text)."""
    if rtol is None and atol is None:
        return SAFETY * error + ANALYTIC_ROUNDING * eps_f * (np.abs(analytic) + terms)
    return (atol or 0.0) + (rtol or 0.0) * np.abs(numeric)


def relative_error(analytic, numeric):
    """|a - n| / max(|a|, |n|); 0 where both are 0, inf where either is not finite."""
    diff = np.abs(analytic - numeric)
    size = np.maximum(np.abs(analytic), np.abs(numeric))
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = np.where(size > 0, diff / np.where(size > 0, size, 1.0), 0.0)
    return np.where(np.isfinite(analytic) & np.isfinite(numeric), rel, np.inf)


def decide(analytic, numeric, allowed, failed) -> np.ndarray:
    """Verdict per coordinate: agree / disagree / non-finite / error."""
    finite = np.isfinite(analytic) & np.isfinite(numeric)
    with np.errstate(invalid="ignore"):
        close = np.abs(analytic - numeric) <= allowed
    verdict = np.where(close, "agree", "disagree").astype(object)
    verdict[~finite] = "non-finite"
    verdict[failed] = "error"
    return verdict


def _round_up_decade(value: float) -> float:
    return float(10.0 ** np.ceil(np.log10(value)))


def suggest_tolerances(analytic, numeric, verdict, margin=10.0) -> tuple:
    """(rtol, atol) that every agreeing coordinate passes with `margin` to spare.

    Coordinates are split by size: those with |numeric| above 1e-6 of the
    largest set rtol, as margin times their largest relative error; the small
    ones set atol, as margin times their largest absolute error.  Both are
    rounded up to a power of ten.  With numpy's rule
    |a - n| <= atol + rtol * |n| each agreeing coordinate then passes.
    """
    ok = verdict == "agree"
    if not np.any(ok):
        return None, None
    a, n = analytic[ok], numeric[ok]
    diff = np.abs(a - n)
    big = np.abs(n) > 1e-6 * np.max(np.abs(n))
    rel = diff[big] / np.abs(n[big]) if np.any(big) else np.zeros(1)
    rtol = _round_up_decade(max(margin * float(np.max(rel)), 1e-15))
    small = diff[~big]
    atol = _round_up_decade(margin * float(np.max(small))) if small.size and np.max(small) > 0 \
        else 0.0
    return rtol, atol
