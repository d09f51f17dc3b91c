"""Probes: a few evaluations along random directions that decide how to check.

Between the stencils and the verdicts in the pipeline: each probe asks the
evaluate stage for a handful of points and reads them with the stencils'
numerics.  The noise lines say how precise the cost's values are (and whether
they are quantized); the complex-safety probe says whether the complex step
may be used; the descent probe says whether a wrong gradient points uphill.
Each returns values; none changes what it was given.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from . import stencils
from .evaluate import CostRunner
from .tree import Layout

# The second and third noise lines are spaced 3/2 and 5/4 of the first (so their points
# are as exact as the first line's, even in float16), each along its own direction: a
# periodic noise that one spacing samples in step with its period (and so looks smooth)
# is out of step with the others.  Two lines missed such noise at 1 of 8 points tried,
# three at none of 40 (tests/test_trust.py).
SECOND_LINE_SPACING = 3 / 2
THIRD_LINE_SPACING = 5 / 4
# A complex-safety probe that meets a non-finite value is tried once more this much shorter.
SHORTER_LINE = 2.0 ** -10
# Relative noise is capped here: beyond it no step gives a useful derivative anyway.
LARGEST_RELATIVE_NOISE = 1e-3
NOISY_ABOVE = 1e4        # relative noise this many epsilons above rounding counts as noise
REPEAT_TOLERANCE = 10.0  # two calls at one point may differ by this many eps (threaded sums)
# Cost values this small next to their variation over a coordinate's scale count as 0.
NEAR_ZERO = 1e-6


@dataclass
class Lines:
    """What the noise lines saw: the features used downstream, and their verdicts."""
    features: stencils.LineFeatures
    quantized: bool          # values repeat exactly and jump in between
    flat: bool               # every value on every finite line equals f(x) exactly
    undefined: bool          # a line met a non-finite value or an error
    direction: np.ndarray    # the first finite line's direction (for the flat-line tests)
    spacing: float = stencils.NOISE_SPACING   # and its spacing
    # The smallest, over the lines that change, of max(curvature_s2, slope): how much the
    # cost varies over a coordinate's scale, for a cost near 0 (precision).  The smallest,
    # because one line sampling periodic noise in step with its period looks like a
    # smooth bend of enormous curvature.
    variation: float = 0.0
    # A low-precision line's level above rounding fell KINK_DROP-fold or more on a shorter
    # line: kinks lie within the lines' reach of the point (_above_rounding), and any
    # stencil as long may cross one.
    kinked: bool = False


def noise_direction(size: int, scale: np.ndarray, seed=0, sizes: int = 1) -> np.ndarray:
    """A random direction with entries of random sign and size between scale/4 and scale.

    Entries are powers of two (sizes=1), so with a power-of-two spacing every point on
    the line is exact even in float16 and float32 leaves: rounding the inputs would look
    like noise.  sizes=8 gives k/16 of a power of two (k = 8..15) instead, exact in
    float64, for the complex-safety probe, where entries of one size can cancel
    (x + y along (1, -1)).
    """
    sign, draws = _direction_draws(size, seed, sizes)
    if sizes == 1:
        return sign * stencils.power_of_two(scale * draws)
    return sign * stencils.power_of_two(scale) * draws / 16


# The draws of the directions of small parameter sets, by (size, seed, sizes): a check
# builds four directions, and building a fresh generator cost more than a small check's
# cost evaluations.  The same seed gives the same draws, so the values are unchanged.
_DRAWS: dict = {}
_DRAWS_KEPT = 64               # (size, seed, sizes) combinations kept
_DRAWS_UP_TO = 4096            # larger directions are drawn afresh (they cost memory)


def _direction_draws(size: int, seed, sizes: int) -> tuple:
    """(signs, sizes) of noise_direction: read-only arrays, drawn from default_rng(seed)."""
    key = (size, seed, sizes)
    found = _DRAWS.get(key)
    if found is not None:
        return found
    rng = np.random.default_rng(seed)
    sign = rng.choice([-1.0, 1.0], size=size)
    draws = rng.uniform(0.5, 1.0, size=size) if sizes == 1 else \
        rng.integers(16 - sizes, 16, size=size)
    found = (sign, draws)
    if size <= _DRAWS_UP_TO and isinstance(seed, int):
        for array in found:
            array.setflags(write=False)
        if len(_DRAWS) >= _DRAWS_KEPT:
            _DRAWS.clear()
        _DRAWS[key] = found
    return found


def _line_values(runner: CostRunner, v, t, f0):
    """f at x + j t v, j = -4..4 (f0 in the middle); None where a point failed or is
    not finite."""
    half = stencils.NOISE_POINTS // 2
    offsets = [j * t for j in range(-half, half + 1) if j != 0]
    run = runner.run([v] * len(offsets), offsets, label="noise probe")
    values = np.concatenate([run.values[:half], [f0], run.values[half:]]).real
    if run.failures or not np.all(np.isfinite(values)):
        return None
    return values


# A nonzero coordinate far smaller than its scale moves along the noise lines by
# 4 t OWN_SIZE_SHARE |x| at most: a quarter of itself at float64's spacing t = 2^-20 (not
# yet at float32's, 2^-10).  At its scale, a line would cross a pole at 0 (gammaln at
# 1e-6 beside an entry of 1e3) whose finite values on the far side read as noise, too
# small next to the cost to be re-measured.
OWN_SIZE_SHARE = 2.0 ** 16
# ... but only down to this share of its scale: below it (x = 1e-17 in x^4) the stencils'
# steps are no shorter than the lines' anyway, and the lines' view of the cost's third
# derivative over their spacing is what bounds a complex step's error there.
SMALLEST_OF_SCALE = 2.0 ** -40


def leaf_largest(base, layout: Layout) -> np.ndarray:
    """Per coordinate, the largest finite |x| of its parameter (leaf)."""
    out = np.zeros(base.size)
    for leaf in layout.leaves:
        part = np.abs(base[leaf.offset:leaf.offset + leaf.size])
        part = part[np.isfinite(part)]
        out[leaf.offset:leaf.offset + leaf.size] = float(np.max(part, initial=0.0))
    return out


def line_reach(base, scale, largest=None) -> np.ndarray:
    """How far the noise lines move each coordinate, per unit of their spacing: its
    scale, or OWN_SIZE_SHARE times |x| where that is smaller and |x| is above
    SMALLEST_OF_SCALE of the scale.  An entry at or below that share (or 0) in a
    parameter whose largest entry is above it (`largest`, per coordinate) moves as that
    entry would: positions in metres, near 1e-10, with one particle at the origin; along
    its scale of 1 the lines carried that particle out of the cluster, and the cost's
    change passed for noise 1e5 times its rounding."""
    size = np.abs(base)
    with np.errstate(invalid="ignore", over="ignore"):
        if largest is not None:
            tiny = ~(size > SMALLEST_OF_SCALE * scale) & \
                (largest > SMALLEST_OF_SCALE * scale)
            size = np.where(tiny, largest, size)
        own = OWN_SIZE_SHARE * size
        small = np.isfinite(size) & (size > SMALLEST_OF_SCALE * scale) & (own < scale)
    return np.where(small, own, scale)


def measure_lines(runner: CostRunner, base, scale, f0, eps, largest=None) -> Lines:
    """Cost values along three random lines with unrelated spacings (More & Wild's
    difference table on each); the larger consistent noise level is kept."""
    t = stencils.noise_spacing(eps)
    seen, undefined, kinked = [], False, False
    reach = line_reach(base, scale, largest)
    v1 = noise_direction(base.size, reach, 0)
    for seed, spacing in ((0, t), (1, t * SECOND_LINE_SPACING), (3, t * THIRD_LINE_SPACING)):
        v = v1 if seed == 0 else noise_direction(base.size, reach, seed)
        values = _line_values(runner, v, spacing, f0)
        if values is None:
            # Near the edge of where the cost is defined.  A shorter line is no help: the
            # cost curves so fast there that the difference table would call it noise.
            undefined = True
            continue
        spread = float(np.sum((v / scale) ** 2))
        features = stencils.line_features(values, spacing, spread)
        seen.append(_settled_line(runner, v, spacing, f0, values, features, spread, eps))
        kinked |= _above_rounding(features, values, eps) and \
            seen[-1][1].noise <= KINK_DROP * features.noise
    if not seen:
        return Lines(stencils.LineFeatures.none(), False, False, undefined, v1)
    # The largest noise level; the other features (typical curvature, slope, third
    # derivative) from the first line that was finite and not flat (a direction the cost
    # does not depend on shows none of them), and the largest curvature of all lines for
    # the one-sided stencils, which see none themselves (one random direction can see a
    # coordinate's curvature at a fraction of its size: the Rosenbrock minimiser).
    first = next((f for values, f, _ in seen if np.any(values != f0)), seen[0][1])
    features = stencils.LineFeatures(
        noise=max(f.noise for _, f, _ in seen), order=first.order,
        curvature_s2=first.curvature_s2, slope=first.slope, third=first.third,
        values=first.values, spacing=first.spacing,
        largest_curvature_s2=max(f.curvature_s2 for _, f, _ in seen))
    quantized = any(stencils.looks_quantized(values, eps) for values, _, _ in seen)
    # Flat: no line changed at all (a line along a direction the cost does not depend on,
    # next to lines that change, says nothing about quantization).
    flat = all(np.all(values == f0) for values, _, _ in seen)
    _, line, direction = seen[0]
    moving = [f for values, f, _ in seen if np.any(values != f0)] or [first]
    variation = min(max(f.curvature_s2, f.slope) for f in moving)
    return Lines(features, quantized, flat, undefined, direction, line.spacing, variation,
                 kinked)


def coordinate_line(setup: "Setup", i: int):
    """The noise line along coordinate i alone (8 evaluations at a first line's
    spacing): (features, eps_f) of what this coordinate's own stencils see, or None where
    a point was not finite.  The lines through all coordinates see every coordinate's
    noise and curvature at once: a float32 entry of 1e4 rounds the cost far more than
    a change of another entry of size 1 does."""
    v = np.zeros(setup.base.size)
    # Over the coordinate's scale, as its stencils' steps are (not line_reach): the noise
    # that matters is the noise where the stencil's points lie.
    v[i] = stencils.power_of_two(setup.scale[i:i + 1])[0]
    # The spacing of a first noise line for this coordinate's precision: the lines through
    # all coordinates may have been shortened for another coordinate's pole.
    spacing = stencils.noise_spacing(float(setup.eps[i]))
    values = _line_values(setup.runner, v, spacing, setup.f0)
    if values is None:
        return None
    # Not measured again at shorter spacings (_settled_line): there a float32 cost's
    # rounding steps pass for a curvature of 1e4, and a level too high only leaves the
    # row undecided, as it was.
    features = stencils.line_features(values, spacing, float((v[i] / setup.scale[i]) ** 2))
    if features.lone_value:
        # Its smooth side's level may be a rounding step's absence, not the noise: the
        # lines through all coordinates decide (a float32 loss near 0, summed from terms
        # of size 1, measured 100 times too precise along one coordinate).
        return None
    size = float(np.max(np.abs(values), initial=abs(setup.f0)))
    return features, relative_precision(setup.runner.output_dtype, features.noise, size)


# A line whose difference table never levels off (stencils.table_settles) is measured
# again this much shorter, up to SHORTER_TRIES times (1/4096 of the spacing).
SHORTER_SPACING = 1 / 16
SHORTER_TRIES = 3


def _too_noisy(features, f0: float) -> bool:
    """A level above LARGEST_RELATIVE_NOISE of the cost, where no step would give a
    useful derivative: more likely a change on a length shorter than the spacing than
    noise.  (Smaller levels stay noise: 1e-8 sin(1e8 x) on a cost of 10 is smooth on
    1e-9, as tanh(x / 1e-6) is on 1e-7, and only its size tells the two apart.)"""
    return features.noise > LARGEST_RELATIVE_NOISE * abs(f0)


# A line is straight between a few bends where at least STRAIGHT_PLACES of its second
# differences are below BEND_SHARE of the largest: noise changes every one of them (7 of 7
# on 1e-8 sin(1e8 x)), a line across ReLU kinks leaves most at 0.
BEND_SHARE = 0.05
STRAIGHT_PLACES = 3


def _straight_between_bends(values) -> bool:
    """Values that a few kinks bend, straight elsewhere: not noise, whatever its level."""
    d2 = np.abs(np.diff(values, 2))
    return int(np.sum(d2 <= BEND_SHARE * np.max(d2))) >= STRAIGHT_PLACES


def _reads_noisy(features, values, eps: float) -> bool:
    """A level that would make the cost noisy (NOISY_ABOVE times eps of its values), on a
    line straight between a few bends (_straight_between_bends)."""
    return features.noise > NOISY_ABOVE * eps * float(np.max(np.abs(values))) and \
        _straight_between_bends(values)


# In a low-precision cost (eps at least stencils.LOW_PRECISION_EPS: float32, float16) a
# settled level above ROUNDING_LEVELS times eps of its values is measured again too:
# rounding reads at about 1 there, and float32's lines are 2^-10 long, long enough to
# cross the kinks of ReLUs whose inputs are 1e-4 from 0 (levels of 10 to 20 were seen);
# read as noise they loosened every error estimate 100-fold.  The shorter level is taken
# only where it dropped KINK_DROP-fold or more: a kink's level scales with the spacing,
# noise's holds. (float64's lines, 2^-20 long, cross kinks only within 1e-6 of the point.)
ROUNDING_LEVELS = 4.0
KINK_DROP = 0.25


def _above_rounding(features, values, eps: float) -> bool:
    return eps >= stencils.LOW_PRECISION_EPS and \
        features.noise > ROUNDING_LEVELS * eps * float(np.max(np.abs(values)))


def _settled_line(runner: CostRunner, v, spacing, f0, values, features, spread,
                  eps: float = 0.0) -> tuple:
    """(values, features, direction) of a line, measured again at shorter spacings where
    its table does not settle, or settles at a level too large for noise (_too_noisy): the
    cost may vary on a length shorter than the spacing along v (a pole or a fast
    oscillation near the point, gammaln at 1e-6, tanh(x / 1e-6)), whose smooth change
    passes for noise.  So is a settled level that would make the cost noisy on a line
    straight between a few bends (_reads_noisy): a line across kinks (ReLUs whose inputs
    are within 1e-7 of 0) settles at a level that scales with the spacing, and read as
    noise it grew every step 100-fold, across the kinks.  The shorter line is taken
    where its level is less than half: noise that is really there keeps its level at any
    spacing (one more line, 8 evaluations, for a cost that is that noisy); so is a
    low-precision level above rounding (_above_rounding), taken only where it drops
    KINK_DROP-fold."""
    best = (values, features)
    unsettled = not features.settled
    rounding_only = not unsettled and not _too_noisy(features, f0) and \
        not _reads_noisy(features, values, eps)
    if rounding_only and not _above_rounding(features, values, eps):
        return best + (v,)
    drop = KINK_DROP if rounding_only else 0.5
    # An unsettled line tries every shorter spacing: a line across a pole can look like
    # steady noise at one of them (gammaln at 1e-7, spacing 7e-8), the same level as the
    # line before.  A settled one stops where the level holds.
    for _ in range(SHORTER_TRIES):
        spacing *= SHORTER_SPACING
        values = _line_values(runner, v, spacing, f0)
        if values is None:
            break
        features = stencils.line_features(values, spacing, spread)
        if features.noise < drop * best[1].noise:
            best = (values, features)
        elif not unsettled:
            break
    return best + (v,)


# A cost flat along the noise line is looked at again farther out, at spacings 4, 16,
# 64, ... times the noise line's, up to 1/16 of each coordinate's scale: a rounded output
# (to 1e-3 or 1e-2, say) is flat at the noise spacing, about 1e-6, but jumps over a few
# hundredths or tenths.  Spacings 4x apart, so that on some line the cost jumps at between
# 1/8 and 1/2 of the steps or so, and its jumps stand between repeated values there.
COARSE_RATIO = 4.0
COARSEST_SPACING = 2.0 ** -4


def look_coarser(runner: CostRunner, lines: Lines, f0: float, eps: float = None) -> Lines:
    """A cost whose values did not change at all along the noise lines: eight more
    points on each of farther lines along the same direction, nearest first, until one
    line's values decide.  Jumps between exact repeats: the cost is piecewise constant
    at the stencils' scale (quantized).  Changes of rounding size (a direction the cost
    does not depend on, as a softmax's along equal shifts of its logits) or a change at
    every step (a flat minimum, smooth farther out): it is not.  Other patterns (a
    hinge's plateau) or no change at all: the next line is looked at."""
    spacing = lines.spacing
    while spacing < COARSEST_SPACING:
        spacing = min(spacing * COARSE_RATIO, COARSEST_SPACING)
        values = _line_values(runner, lines.direction, spacing, f0)
        if values is None:
            return lines
        found = stencils.steps_seen(values, eps)
        if found is not None:
            return replace(lines, quantized=True) if found else lines
    return lines


def relative_precision(dtype, noise: float, size: float) -> float:
    """eps_f: the dtype's epsilon, or the measured noise relative to the size of the
    cost's values near the point, where larger (capped at LARGEST_RELATIVE_NOISE)."""
    eps = float(np.finfo(dtype).eps)
    relative = noise / size if size != 0 else 0.0
    return float(min(max(eps, relative), max(eps, LARGEST_RELATIVE_NOISE)))


def repeat_differs(first: float, again: float) -> bool:
    """Two calls at the same point differ by more than a threaded sum's rounding."""
    return abs(again - first) > REPEAT_TOLERANCE * np.finfo(float).eps * \
        max(abs(first), abs(again))


def precision(lines: Lines, f0: float, output_dtype, leaf_eps: np.ndarray) -> tuple:
    """(eps_f, noisy, eps): the relative precision of the cost's values, whether they are
    noisy well beyond rounding, and the per-coordinate eps that steps are sized from.

    Noise counts relative to the size of the cost's values, or of its variation over a
    coordinate's scale where larger: at a point where the cost is 0 (x |x| at 0), a tiny
    absolute level would otherwise pass for large relative noise.  Steps grow only for
    costs noisy well beyond rounding (More & Wild, ACM TOMS 38(3), 2012); rounding-level
    noise enlarged by cancellation only enters the error estimates.
    """
    line = lines.features
    dtype_eps = float(np.finfo(output_dtype).eps)
    size = float(np.max(np.abs(line.values), initial=abs(f0)))
    if size <= NEAR_ZERO * lines.variation:
        size = lines.variation
    eps_f = relative_precision(output_dtype, line.noise, size)
    noisy = eps_f > NOISY_ABOVE * dtype_eps
    return eps_f, noisy, np.maximum(leaf_eps, eps_f if noisy else dtype_eps)


def complex_safety(runner: CostRunner, base, scale, f0, eps_f, eps, noise, seed) -> tuple:
    """Is the cost complex-safe?  (safe, reason), from two complex and four real
    evaluations along one random direction (see stencils.complex_probe_agrees).

    The direction has power-of-two entries and the step is a power of two, so the
    real points are exact: rounded inputs would pass for a cost that is not safe.
    """
    v = noise_direction(base.size, scale, 2 if seed is None else 2 + abs(int(seed)), sizes=8)
    t = float(stencils.power_of_two(np.array(np.max(eps) ** (1 / 3))))
    with warnings.catch_warnings():
        warnings.simplefilter("error", np.exceptions.ComplexWarning)
        complex_run = runner.run([v, v], [1j * stencils.COMPLEX_STEP, 1j * t],
                                 label="complex-step probe")
    if complex_run.failures:
        exc = next(iter(complex_run.failures.values()))
        return False, f"the cost fails at a complex point ({type(exc).__name__}: {exc})"
    real_run = runner.run([v] * 4, [t, -t, 2 * t, -2 * t], label="complex-step probe")
    if real_run.failures or not np.all(np.isfinite(real_run.values)):
        t *= SHORTER_LINE     # near the edge of where the cost is defined
        complex_run = runner.run([v, v], [1j * stencils.COMPLEX_STEP, 1j * t],
                                 label="complex-step probe")
        real_run = runner.run([v] * 4, [t, -t, 2 * t, -2 * t], label="complex-step probe")
        if complex_run.failures or real_run.failures or \
                not np.all(np.isfinite(real_run.values)):
            return False, ("the probe could not decide: the cost fails or is not finite near "
                           "the point")
    safe, reason = stencils.complex_probe_agrees(complex_run.values, real_run.values, f0,
                                                 stencils.COMPLEX_STEP, t, eps_f, noise)
    gap = stencils.slopes_gap(complex_run.values, real_run.values, stencils.COMPLEX_STEP, t)
    for _ in range(SHORTER_PROBES):
        if safe or not reason.startswith(stencils.SLOPES_DIFFER):
            break
        # The real differences may be the wrong ones: a step far longer than the length
        # the cost varies on along v (a parameter of natural size 1e-8 whose scale is 1).
        # Again SHORTER_LINE shorter; a cost that drops the imaginary part (abs(),
        # conj()) shows the same disagreement at any step.
        t *= SHORTER_LINE
        complex_run = runner.run([v, v], [1j * stencils.COMPLEX_STEP, 1j * t],
                                 label="complex-step probe")
        real_run = runner.run([v] * 4, [t, -t, 2 * t, -2 * t], label="complex-step probe")
        if not complex_run.failures and not real_run.failures and \
                np.all(np.isfinite(real_run.values)):
            again = stencils.complex_probe_agrees(complex_run.values, real_run.values, f0,
                                                  stencils.COMPLEX_STEP, t, eps_f, noise)
            nearer = stencils.slopes_gap(complex_run.values, real_run.values,
                                         stencils.COMPLEX_STEP, t)
            if again[0] or not again[1].startswith(stencils.SLOPES_DIFFER) or \
                    not nearer < 0.5 * gap:
                # Safe; or inconclusive; or no nearer (a cost that drops the imaginary
                # part): one more probe, 6 evaluations, and no more.
                return again if again[0] else (safe, reason)
            gap = nearer
    return safe, reason


# A complex step whose slope disagrees with the real differences is probed again at
# steps SHORTER_LINE shorter, up to this many times (2^-30 of the first step).
SHORTER_PROBES = 3


def descent_uphill(runner: CostRunner, analytic, scale, f0, noise, eps_f) -> bool:
    """Does a small step against the analytic gradient raise the cost, and one along
    it lower it (2 evaluations)?  A change below the cost's noise proves nothing.

    The step moves each coordinate by at most 1e-4 of its scale.
    """
    g = analytic
    size = float(np.max(np.abs(g) * scale)) if np.all(np.isfinite(g)) else 0.0
    if size == 0.0:
        return False
    t = 1e-4 / size
    run = runner.run([-g * scale ** 2, g * scale ** 2], [t, t], label="descent check")
    if run.failures:
        return False
    down, up = run.values.real - f0
    expected = t * float(np.sum((g * scale) ** 2))
    resolvable = expected > 100 * max(noise, eps_f * abs(f0))
    return bool(resolvable and down > 0 and up < 0)


def flat_but_sloped(lines: Lines, analytic, f0) -> bool:
    """The lines' values are all exactly f(x), yet the analytic gradient says the first
    line's change by far more than rounding over it: the cost is piecewise constant."""
    if not lines.flat or lines.features.values.size == 0 or not np.all(np.isfinite(analytic)):
        return False
    reach = (stencils.NOISE_POINTS // 2) * lines.spacing
    predicted = abs(float(analytic @ lines.direction)) * reach
    return predicted > 1e3 * np.finfo(float).eps * max(abs(f0), 1e-300)


@dataclass
class Setup:
    """What every check needs after the cost has run at the base point and its noise lines.

    Built once by the pipeline's `prepare`; later stages read it and never change it
    (except the runner, which counts evaluations and remembers an interrupt).
    """
    runner: CostRunner
    base: np.ndarray
    layout: Layout
    f0: float
    eps_f: float                 # relative precision of the cost's values
    eps: np.ndarray              # per coordinate: max(leaf dtype eps, eps_f), for steps
    scale: np.ndarray
    line: stencils.LineFeatures
    noisy: bool                  # noise well above rounding: steps were enlarged for it
    notes: list = field(default_factory=list)
    problems: list = field(default_factory=list)
    lines: Lines = None
