"""Verdicts of the stochastic-gradient check: biased, unbiased within the resolution, undecided.

Per coordinate i, with reference r_i (error bound e_i), mean of the draws m_i, bias estimate
b_i = m_i - r_i and simultaneous interval b_i +- (e_i + q_i s_i) at one round's alpha:

- disagree: Holm's procedure rejects "no bias" (see stochastic_stats.bias_p_values);
- agree: not rejected, and the whole interval lies within +- resolution * scale_i: any bias
  is smaller than the resolution, with the same confidence;
- noisy: neither; the row says about how many draws would decide it.
- non-finite (a draw gave NaN or inf there) and error (the reference failed there) are not
  tested and take no part in the multiple-testing family.

scale_i is max(|r_i|, rms(r)): a coordinate whose reference is near zero is judged against
the size of the whole gradient, not against its own tiny value.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import stochastic_stats as stats
from .tree import Layout, coordinate_name, leaf_of_each


def count(n: int, noun: str) -> str:
    """'1 coordinate', '3 coordinates'."""
    return f"{n} {noun}" + ("" if n == 1 else "s")


def name_list(names, limit: int = 4) -> str:
    """'a, b, c, d and 3 more'."""
    names = list(names)
    return ", ".join(names[:limit]) + (f" and {len(names) - limit} more"
                                       if len(names) > limit else "")


@dataclass
class Decision:
    """One round's verdicts and the numbers behind them (arrays over coordinates)."""
    alpha: float                 # the family-wise alpha spent at this round
    bias: np.ndarray
    low: np.ndarray
    high: np.ndarray
    scale: np.ndarray
    p_value: np.ndarray
    detectable: np.ndarray       # absolute; divide by scale for the relative one
    draws_needed: np.ndarray     # for noisy rows; 0 where a row is decided, -1 when no count does
    #                              (estimated with the bias estimate as it stands)
    verdict: np.ndarray
    details: list

    @property
    def decided(self) -> bool:
        return not np.any(self.verdict == "noisy")


def scales(reference: np.ndarray, usable: np.ndarray, spread: np.ndarray) -> np.ndarray:
    """max(|r_i|, rms of the usable reference); the draws' spread stands in for an all-zero
    reference (then agreement means a bias below resolution times the spread)."""
    r = np.where(usable, np.abs(reference), 0.0)
    rms = math.sqrt(float(np.mean(r[usable] ** 2))) if usable.any() else 0.0
    if rms == 0.0:
        rms = math.sqrt(float(np.mean(spread[usable] ** 2))) if usable.any() else 0.0
    return np.maximum(r, rms if rms > 0 else 1.0)


def decide(s: stats.Summary, reference: np.ndarray, reference_error: np.ndarray,
           usable: np.ndarray, alpha: float, resolution: float, max_draws: int,
           reference_details: list, non_finite: np.ndarray, first_non_finite: np.ndarray
           ) -> Decision:
    """Verdicts of one round at family-wise alpha (Holm's step-down over usable rows)."""
    size = reference.size
    tested = usable & (non_finite == 0)
    bias = s.mean - reference
    p = stats.bias_p_values(bias, reference_error, s)
    p = np.where(tested, p, np.nan)
    reject = stats.holm(p, alpha)
    m = max(int(tested.sum()), 1)
    w = stats.widths(alpha / m, s, reference_error)
    reach = reference_error + w.half_width
    scale = scales(reference, tested, s.std)
    allowed = resolution * scale
    agree = tested & ~reject & (np.abs(bias) + reach <= allowed)
    verdict = np.where(reject, "disagree", np.where(agree, "agree", "noisy")).astype(object)
    # More draws decide a row once the interval's statistical half-width (shrinking as
    # 1/sqrt(n)) fits in the room for either verdict, the bias estimate taken as it stands:
    # below |b| - e it excludes 0 (disagree), below resolution - |b| - e it agrees.
    room = np.maximum(np.abs(bias) - reference_error, allowed - np.abs(bias) - reference_error)
    with np.errstate(all="ignore"):
        need = np.where(room > 0, np.ceil(s.count * (w.half_width / room) ** 2), -1)
    need = np.where(verdict == "noisy", need, 0).astype(np.int64)
    details = []
    for i in range(size):
        text = ""
        if not usable[i]:
            verdict[i], text = "error", reference_details[i]
        elif non_finite[i]:
            verdict[i] = "non-finite"
            text = (f"{count(int(non_finite[i]), 'draw')} of {s.count} "
                    f"non-finite here (the first: draw {int(first_non_finite[i])})")
        elif verdict[i] == "noisy":
            text = _noisy_detail(int(need[i]), max_draws)
        if usable[i] and s.robust[i]:
            text = (text + "; " if text else "") + (
                f"heavy-tailed draws (kurtosis {s.kurtosis[i]:.3g}): batch-means interval")
        details.append(text)
    low = np.where(tested, bias - reach, np.nan)
    high = np.where(tested, bias + reach, np.nan)
    return Decision(alpha, bias, low, high, scale, p, w.detectable, need,
                    verdict.astype(str), details)


def _noisy_detail(need: int, max_draws: int) -> str:
    if need > 0:
        return f"about {need} draws would decide it (max_draws={max_draws})"
    return ("the reference's own error is as large as the resolution: more draws cannot "
            "decide it (pass gradient= with exact values, or a larger resolution)")


# --- hints ------------------------------------------------------------------------------
def hints(layout: Layout, d: Decision, reference: np.ndarray, mean: np.ndarray) -> list:
    """Sentences naming the pattern of a bias: one constant factor, a sign, one parameter."""
    bad = d.verdict == "disagree"
    if not bad.any():
        return []
    out = []
    factor = _common_factor(d, reference, mean)
    if factor is not None:
        out.append(_factor_sentence(*factor))
    out += _single_parameter(layout, d)
    return out


def _common_factor(d: Decision, reference, mean):
    """(c, its standard error) when mean = c * reference fits every tested coordinate."""
    tested = np.isfinite(d.low)
    reach = (d.high - d.low) / 2.0
    solid = tested & (np.abs(reference) > reach)
    if solid.sum() < 1:
        return None
    r, m, w = reference[solid], mean[solid], np.maximum(reach[solid], 1e-300)
    c = float(np.sum(r * m / w ** 2) / np.sum(r ** 2 / w ** 2))
    c_error = float(1.0 / math.sqrt(np.sum(r ** 2 / w ** 2)))
    fits = np.abs(mean[tested] - c * reference[tested]) <= \
        reach[tested] + 3.0 * c_error * np.abs(reference[tested])
    if not fits.all() or abs(c - 1.0) <= 3.0 * c_error:
        return None
    return c, c_error


def _factor_sentence(c: float, c_error: float) -> str:
    if abs(c + 1.0) <= max(3.0 * c_error, 0.02):
        return ("sign: on average the draws are the negative of the reference in every "
                "coordinate: a flipped sign (a score-function term f * grad log p taken with "
                "the wrong sign, or the gradient of the reward where the cost's is meant)")
    if abs(c) <= c_error:
        return ("zero on average: the draws average to zero where the reference does not: "
                "the estimator misses its main term")
    if abs(c) <= 3.0 * c_error:
        # Not told apart from 0 yet, but not 0 either: name both readings.
        return (f"small factor: on average the draws are {c:.2g} (+- {c_error:.1g}) times the "
                "reference in every coordinate: a small factor such as batch size versus "
                "data size (a mini-batch sum divided by N instead of B is off by B/N), or an "
                "estimator that misses its main term; more draws (max_draws) tell them apart")
    size = f"{c:.4g}" + (f" (1/{1 / c:.4g})" if 0 < c < 1 else "")
    text = (f"factor: on average the draws are {size} times the reference in every "
            "coordinate: right direction, wrong length")
    if c < 0:
        return text + "; a negative factor: a flipped sign and a wrong scale together"
    if c < 0.9:
        return text + (": batch size versus data size? A mini-batch sum divided by the data "
                       "size N instead of the batch size B is off by B/N; a dropout mask "
                       "without its 1/(1-p) scaling is off by the keep probability 1-p; a "
                       "baseline taken from the same K samples without its K/(K-1) "
                       "correction is off by (K-1)/K")
    if c > 1.1:
        return text + (": data size versus batch size? A mini-batch sum divided by B where "
                       "the cost sums over all N items is off by N/B; a sum where a mean is "
                       "meant, or importance weights that are not normalised, also scale the "
                       "estimate up")
    return text + (": a ratio close to 1, as from a partial last batch dropped or weighted "
                   "like a full one, or a count off by one in a normalisation")


def _single_parameter(layout: Layout, d: Decision) -> list:
    leaf_no = leaf_of_each(layout)
    bad = d.verdict == "disagree"
    bad_leaves = set(leaf_no[bad].tolist())
    if len(bad_leaves) != 1 or len(layout.leaves) < 2:
        return []
    k = bad_leaves.pop()
    if not np.any((leaf_no != k) & (d.verdict == "agree")):
        return []
    name = layout.leaves[k].name
    return [f"single parameter: only '{name}' is biased while the other parameters agree: look "
            f"at the part of the estimator that computes '{name}' (a dropout mask, a sampled "
            "term or a weight that feeds only it)"]


def notes(layout: Layout, d: Decision, s: stats.Summary, max_draws: int) -> list:
    """Sentences on undecided, heavy-tailed and non-finite coordinates."""
    out = []
    noisy = np.flatnonzero(d.verdict == "noisy")
    if noisy.size:
        names = [coordinate_name(layout, int(i)) for i in noisy]
        need = d.draws_needed[noisy]
        known = need[need > 0]
        more = (f"; about {int(known.max())} draws would decide "
                f"{'them all' if known.size == noisy.size else 'those that can be'}"
                if known.size else "")
        out.append(f"{count(noisy.size, 'coordinate')} undecided after {s.count} draws: the "
                   f"draws vary too much for the budget (max_draws={max_draws}) to tell a bias "
                   f"below the resolution from none: {name_list(names)}{more}")
    heavy = np.flatnonzero(s.robust & np.isfinite(d.low))
    if heavy.size:
        names = [coordinate_name(layout, int(i)) for i in heavy]
        out.append(f"{count(heavy.size, 'coordinate')} with heavy-tailed draws (large "
                   f"kurtosis): their intervals also use batch means over {stats.GROUPS} "
                   f"groups, which need no reliable variance of single draws: {name_list(names)}")
    return out
