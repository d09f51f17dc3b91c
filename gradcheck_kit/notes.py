"""The sentences a report carries besides its rows: notes (what the reader should know)
and problems (what fails the check although no row does).

Between hints and report in the pipeline: each function turns values found by an
earlier stage into one sentence, so the wording lives in one place and the stages
that find things stay free of prose.  Nothing here computes or evaluates.
"""
from __future__ import annotations

import numpy as np

from .probes import LARGEST_RELATIVE_NOISE
from .verdicts import count, name_list


# --- at the base point and along the noise lines -----------------------------------------
def edits_input(changed) -> str:
    return (f"the cost modifies its input in place (it changed {', '.join(changed)} during a "
            "call); every call here gets its own copy, so your arrays are unchanged, but code "
            "that reuses the arrays after calling the cost is not")


def not_deterministic(first: float, again: float) -> str:
    first, again = float(first), float(again)
    difference = abs(again - first)
    relative = difference / max(abs(first), abs(again), 1e-300)
    return (f"the cost is not deterministic: two calls at the same parameters returned "
            f"{first!r} and {again!r} (difference {difference:.3g}, relative {relative:.3g}). "
            "Numeric derivatives of a random cost are meaningless: seed its random generator, "
            "fix the mini-batch, and switch off dropout or sampling before checking the "
            "gradient (or pass with_rng=True to check one draw of it exactly)")


def non_finite_params(names) -> str:
    return (f"params hold non-finite entries ({name_list(names)}): the cost is finite here, "
            "so it does not read them; their rows compare derivatives taken at a non-finite "
            "point")


def lower_precision(output_dtype, low_leaves) -> list:
    notes = []
    eps = np.finfo(output_dtype).eps
    if eps > np.finfo(np.float64).eps:
        notes.append(f"the cost returns {np.dtype(output_dtype).name} values: steps and error "
                     f"estimates use its precision (eps {eps:.3g}), so agreement means less "
                     "than in float64")
    if low_leaves:
        notes.append(f"parameters {', '.join(low_leaves)} are stored in lower precision; their "
                     "steps are sized for it")
    return notes


def undefined_on_lines() -> str:
    return ("the cost is not finite (or fails) at some points of the noise probe near the "
            "base point: the noise level was measured on fewer points")


def quantized() -> str:
    return ("the cost's values are piecewise constant along a random line (they repeat "
            "exactly and jump in between): a rounded, integer-valued or quantized output, "
            "whose derivative is zero almost everywhere; numeric differences only measure "
            "its jumps")


def noisy(level: float, relative: float) -> str:
    # The relative precision is capped (probes.LARGEST_RELATIVE_NOISE): say "at least" there.
    share = (f"{relative:.2g} relative" if relative < LARGEST_RELATIVE_NOISE else
             f"{LARGEST_RELATIVE_NOISE:.2g} relative or more")
    return (f"the cost is noisy: its values carry noise of about {level:.2g} ({share}, "
            "measured along three lines after More & Wild); steps and error estimates allow "
            "for it")


def flat_but_sloped() -> str:
    return ("the cost does not change along a random line through the point although the "
            "analytic gradient says it should: it is piecewise constant (rounded or "
            "quantized) here, or the gradient is wrong")


# --- choices made before the sweep ---------------------------------------------------------
def seeded_draw(seed: int, gradient_too: bool) -> str:
    return (f"with_rng: every call of the cost{' and gradient' if gradient_too else ''} got a "
            f"generator seeded with {seed} (common random numbers), so this checks the "
            f"gradient of that one draw; seed={seed} replays it, another seed checks another")


def duration(seconds: float) -> str:
    """A time in the unit a reader expects: ms, s, minutes or hours."""
    if seconds < 1:
        return f"{seconds * 1000:.3g} ms"
    if seconds < 120:
        return f"{seconds:.3g} s"
    if seconds < 7200:
        return f"{seconds / 60:.3g} minutes"
    return f"{seconds / 3600:.3g} hours"


def long_check(seconds: float, calls: int, per_call: float, *, sampled: bool,
               spread: bool) -> str:
    """The estimate of a long sweep, and the quicker ways to check."""
    quicker = []
    if not sampled:
        quicker.append("check a sample of the coordinates (coordinates=k per parameter)")
    quicker.append("find the wrong coordinates by group testing (gk.locate_mismatches, or "
                   "gradcheck-kit locate), which needs about k log2(n/k) probes for k wrong "
                   "ones")
    if not spread:
        quicker.append("spread the calls (executor=..., --workers N) or batch them "
                       "(vectorized=True)")
    return (f"this check will take about {duration(seconds)}: {calls} evaluations of the cost "
            f"at about {duration(per_call)} each; to go faster, " + "; or ".join(quicker))


# --- after the comparison -----------------------------------------------------------------
def rechecked(agreed, method: str) -> str:
    # Says which stencil decided: the report's method line names the first one only.
    return (f"{count(len(agreed), 'coordinate')} where the {method} differences disagreed "
            f"or only roughly agreed were rechecked with Richardson extrapolation and pass "
            f"by its values: {name_list(agreed)}")


def lower_precision_gradient(eps_a: float) -> str:
    return (f"the analytic gradient holds values of lower precision (eps {eps_a:.3g}): the "
            "allowance includes their rounding, so agreement means less than in float64")


def undefined_stencils(names) -> str:
    return (f"the cost is not finite at some stencil points of "
            f"{count(len(names), 'coordinate')} ({name_list(names)}): those were redone with "
            "shorter steps or one-sided differences (see their rows); the others are "
            "unaffected")


def on_kinks(names) -> str:
    return (f"{count(len(names), 'coordinate')} on a kink, where the cost has two one-sided "
            f"slopes and the analytic value lies between them: {name_list(names)}; a kink "
            "does not fail the check")


def undecided(names, noise: float) -> str:
    return (f"{count(len(names), 'coordinate')} could not be decided: the numeric "
            f"derivative's error estimate is as large as the values (cost noise about "
            f"{noise:.2g}): {name_list(names)}")


def kinks_unresolved(names) -> str:
    return (f"{count(len(names), 'coordinate')} could not be decided: kinks lie near the "
            "point, a difference across one is off by more than its error estimate, and "
            "the one-sided differences short enough to miss them are too rounded to tell "
            f"in this precision: {name_list(names)}; check them at a point farther from "
            "the kinks, or in float64")


def nothing_decided(rows: int) -> str:
    return (f"no coordinate could be decided: all {rows} are undecided (noisy), so nothing "
            "was checked; make the cost deterministic and smooth at this point (for a "
            "rounded or quantized cost, give a step= long enough to cross its jumps), or "
            "pass allow_undecided=True to accept this")



# --- the mismatch search (locate.py) ------------------------------------------------------
def search_note(probes: int, coordinates: int, isolated: int, confirmed: int,
                sweep: int) -> str:
    """What the group probes did, and what a full sweep would have cost instead."""
    if not isolated:
        found = "isolated none"
    elif confirmed == isolated:
        found = (f"isolated {isolated}, " +
                 ("which was then checked on its own" if isolated == 1 else
                  "each then checked on its own"))
    else:
        found = f"isolated {isolated}, of which {confirmed} could be checked on its own"
    return (f"group testing: {count(probes, 'probe')} over {count(coordinates, 'coordinate')} "
            f"{found} (a full sweep would have cost {count(sweep, 'evaluation')})")


def search_budget_spent(budget: int, probes: int, isolated: int, left: int) -> str:
    return (f"the budget of {count(budget, 'evaluation')} ran out after "
            f"{count(probes, 'group probe')}: {count(isolated, 'wrong coordinate')} isolated "
            f"so far, {count(left, 'coordinate')} not cleared")


def unconfirmed(number: int) -> str:
    if number == 1:
        return "1 isolated coordinate was not confirmed on its own: the budget ran out"
    return f"{number} isolated coordinates were not confirmed on their own: the budget ran out"
