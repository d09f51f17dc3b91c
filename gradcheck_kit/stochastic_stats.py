"""Statistics of the stochastic-gradient check: moments of the draws, intervals, tests.

Everything here is plain numpy on arrays with one entry per coordinate, with no knowledge
of params or of the estimator.  What is assumed and where it comes from:

- The mean of n independent draws is nearly normal (central limit theorem), and the
  studentized mean (mean - mu) / (s / sqrt(n)) is taken to follow Student's t with n - 1
  degrees of freedom: the usual one-sample t interval (any statistics handbook, e.g.
  NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.5.2).  For two-sided tests
  the skewness term of the t statistic's Edgeworth expansion cancels, which is why
  two-sided t tests hold their level on skewed draws better than one-sided ones (Hall,
  The Bootstrap and Edgeworth Expansion, 1992; from memory).
- Where the draws are heavy-tailed the sample variance is itself unreliable: its relative
  standard deviation is about sqrt((kurtosis - 1) / n) (a large-sample fact, e.g. Kendall
  & Stuart, The Advanced Theory of Statistics, vol. 1; from memory).  There the test also
  uses batch means: the draws are split into GROUPS interleaved groups, the group means are
  far closer to normal than single draws, and a t interval with GROUPS - 1 degrees of
  freedom is taken on them (the method of batch means of simulation output analysis, e.g.
  Law, Simulation Modeling and Analysis, ch. 9; Schmeiser, Operations Research 30(3),
  1982).  The coordinate keeps the larger (more cautious) of the two p-values.
- Student's t tail is computed from the regularized incomplete beta function,
  P(T > t) = I_x(df/2, 1/2) / 2 with x = df / (df + t^2) (DLMF 8.17 and 8.17.22 for the
  continued fraction, evaluated by the modified Lentz method).
- Many coordinates are tested at once: Holm's step-down procedure (Holm, Scandinavian
  Journal of Statistics 6(2), 1979) keeps the family-wise error rate at the round's alpha
  under any dependence between coordinates.  The intervals shown are the simultaneous
  Bonferroni ones at the same alpha (Holm rejects at least what Bonferroni rejects).
- Several rounds are looked at: the level is spent over the rounds (alpha_k proportional
  to the draws of round k, summing to `level`), so by the union bound the chance of any
  false alarm in any round is at most `level`.
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np

GROUPS = 16                  # interleaved groups for batch means (draw k goes to k % GROUPS)
POWER = 0.95                 # power behind the "smallest detectable bias"
# A coordinate's variance estimate counts as unreliable, and batch means are used too, when
# the excess kurtosis is beyond chance for normal draws (more than 4 standard errors,
# sqrt(24 / n), of the sample kurtosis under normality: common practice) and the
# variance's own relative error sqrt((kurtosis - 1) / n) exceeds VARIANCE_RELATIVE_ERROR.
KURTOSIS_SIGMAS = 4.0
VARIANCE_RELATIVE_ERROR = 0.1


# --- distributions -----------------------------------------------------------------------
def _beta_continued_fraction(a: float, b: float, x: np.ndarray, iterations: int = 400):
    """The continued fraction of I_x(a, b) (DLMF 8.17.22), modified Lentz, vectorized in x."""
    tiny = 1e-300
    c = np.ones_like(x)
    d = 1.0 - (a + b) * x / (a + 1.0)
    d = 1.0 / np.where(np.abs(d) < tiny, tiny, d)
    h = d.copy()
    for m in range(1, iterations + 1):
        for aa in (m * (b - m) * x / ((a + 2 * m - 1) * (a + 2 * m)),
                   -(a + m) * (a + b + m) * x / ((a + 2 * m) * (a + 2 * m + 1))):
            d = 1.0 + aa * d
            d = 1.0 / np.where(np.abs(d) < tiny, tiny, d)
            c = 1.0 + aa / c
            c = np.where(np.abs(c) < tiny, tiny, c)
            step = d * c
            h = h * step
        if np.all(np.abs(step - 1.0) < 1e-15):
            break
    return h


def regularized_beta(x, a: float, b: float) -> np.ndarray:
    """I_x(a, b) for an array x in [0, 1] and scalar a, b > 0 (DLMF 8.17.2).

    Examples
    --------
    >>> float(regularized_beta(0.5, 2.0, 2.0))
    0.5
    """
    x = np.asarray(x, dtype=float)
    out = np.where(x >= 1.0, 1.0, 0.0)
    inside = (x > 0.0) & (x < 1.0)
    log_beta = math.lgamma(a) + math.lgamma(b) - math.lgamma(a + b)
    direct = inside & (x < (a + 1.0) / (a + b + 2.0))  # where the fraction converges fast
    if direct.any():
        xs = x[direct]
        front = np.exp(a * np.log(xs) + b * np.log1p(-xs) - log_beta) / a
        out[direct] = front * _beta_continued_fraction(a, b, xs)
    mirror = inside & ~direct                          # I_x(a, b) = 1 - I_{1-x}(b, a)
    if mirror.any():
        ys = 1.0 - x[mirror]
        front = np.exp(b * np.log(ys) + a * np.log1p(-ys) - log_beta) / b
        out[mirror] = 1.0 - front * _beta_continued_fraction(b, a, ys)
    return out


def t_tail(t, df: float) -> np.ndarray:
    """P(T > t) for Student's t with `df` degrees of freedom (t >= 0 accurate far out).

    Examples
    --------
    >>> round(float(t_tail(0.0, 10)), 12)
    0.5
    """
    t = np.asarray(t, dtype=float)
    upper = 0.5 * regularized_beta(df / (df + t * t), df / 2.0, 0.5)
    return np.where(t >= 0, upper, 1.0 - upper)


def t_quantile(p: float, df: float) -> float:
    """The t with P(T > t) = p, for 0 < p < 1/2.

    Newton's method on log P(T > t), which is concave and decreasing in t, from a bracket
    found by doubling; a bisection step wherever Newton would leave the bracket.  Results
    are cached: a check asks for the same few quantiles at every round.

    Examples
    --------
    >>> round(t_quantile(0.025, 1e6), 2)
    1.96
    """
    if not 0.0 < p < 0.5:
        raise ValueError(f"t_quantile: expected 0 < p < 0.5, got {p}")
    return _t_quantile(float(p), float(df))


@functools.lru_cache(maxsize=1024)
def _t_quantile(p: float, df: float) -> float:
    log_p = math.log(p)
    # log of the t density's constant: Gamma((df+1)/2) / (sqrt(df pi) Gamma(df/2))
    log_c = math.lgamma((df + 1) / 2) - math.lgamma(df / 2) - 0.5 * math.log(df * math.pi)
    lo, hi = 0.0, 1.0
    while float(t_tail(hi, df)) > p:
        lo, hi = hi, 2.0 * hi
    t = 0.5 * (lo + hi)
    for _ in range(100):
        tail = float(t_tail(t, df))
        if tail > p:
            lo = t
        else:
            hi = t
        gap = math.log(tail) - log_p
        if abs(gap) < 1e-13 or hi - lo < 1e-14 * hi:
            break
        density = math.exp(log_c - (df + 1) / 2 * math.log1p(t * t / df))
        step = t + gap * tail / density          # Newton on log P(T > t)
        t = step if lo < step < hi else 0.5 * (lo + hi)
    return t


# --- moments of the draws ----------------------------------------------------------------
class Moments:
    """Running power sums of the draws, per coordinate, shifted by the first draw.

    Shifting by one draw keeps the sums of squares from cancelling when the mean is large
    next to the spread.  Group sums (draw k in group k % GROUPS) feed the batch means.
    Non-finite entries are counted per coordinate and left out of the sums.
    """

    def __init__(self, size: int):
        self.size = size
        self.count = 0
        self.shift = None
        self.sums = np.zeros((4, size))
        self.group_sums = np.zeros((GROUPS, size))
        self.group_counts = np.zeros(GROUPS, dtype=int)
        self.non_finite = np.zeros(size, dtype=int)
        self.first_non_finite = np.full(size, -1)
        self.identical = True          # every draw so far equals the first, bit for bit

    def add(self, values: np.ndarray, draw_numbers: np.ndarray) -> None:
        """Add draws (rows of `values`) numbered `draw_numbers` (their stream numbers)."""
        if values.shape[0] == 0:
            return
        finite = np.isfinite(values)
        bad = ~finite
        if bad.any():
            self.non_finite += bad.sum(axis=0)
            first = np.where(bad.any(axis=0), draw_numbers[np.argmax(bad, axis=0)], -1)
            fresh = (self.first_non_finite < 0) & (first >= 0)
            self.first_non_finite[fresh] = first[fresh]
        if self.shift is None:
            self.shift = np.where(finite[0], values[0], 0.0)
        same = (values == self.shift) | (bad & ~np.isfinite(self.shift))
        self.identical = self.identical and bool(same.all())
        dev = np.where(finite, values - self.shift, 0.0)
        power = dev.copy()
        for k in range(4):
            self.sums[k] += power.sum(axis=0)
            power *= dev
        groups = np.asarray(draw_numbers) % GROUPS
        np.add.at(self.group_sums, groups, dev)
        np.add.at(self.group_counts, groups, 1)
        self.count += values.shape[0]


@dataclass
class Summary:
    """Per-coordinate statistics of the mean of the draws."""
    count: int
    mean: np.ndarray
    std: np.ndarray              # sample standard deviation of one draw
    standard_error: np.ndarray   # of the mean: the t one, or batch means where less reliable
    df: np.ndarray               # degrees of freedom behind standard_error
    kurtosis: np.ndarray         # m4 / m2^2 (3 for normal draws); NaN where no spread
    robust: np.ndarray           # batch means are used too (heavy tails)
    t_error: np.ndarray          # the plain t standard error
    batch_error: np.ndarray      # the batch-means standard error (NaN if not available)


def summarize(m: Moments) -> Summary:
    """Mean, spread, kurtosis and standard errors from the running sums."""
    n = m.count
    if n < 2:
        raise ValueError("summarize: need at least 2 draws")
    r1, r2, r3, r4 = (s / n for s in m.sums)
    m2 = np.maximum(r2 - r1 ** 2, 0.0)
    m4 = r4 - 4 * r1 * r3 + 6 * r1 ** 2 * r2 - 3 * r1 ** 4
    with np.errstate(all="ignore"):
        kurtosis = np.where(m2 > 0, m4 / m2 ** 2, np.nan)
    std = np.sqrt(m2 * n / (n - 1))
    t_error = std / math.sqrt(n)
    batch_error = np.full(m.size, np.nan)
    filled = m.group_counts > 0
    g = int(filled.sum())
    if g >= 4:
        means = m.group_sums[filled] / m.group_counts[filled][:, None]
        batch_error = means.std(axis=0, ddof=1) / math.sqrt(g)
    excess = np.nan_to_num(kurtosis - 3.0, nan=0.0)
    shaky = (excess > KURTOSIS_SIGMAS * math.sqrt(24.0 / n)) & \
        (np.sqrt(np.maximum(np.nan_to_num(kurtosis, nan=1.0) - 1.0, 0.0) / n)
         > VARIANCE_RELATIVE_ERROR)
    robust = shaky & np.isfinite(batch_error)
    return Summary(n, m.shift + r1, std, t_error, np.full(m.size, float(n - 1)), kurtosis,
                   robust, t_error, batch_error)


# --- tests and intervals ------------------------------------------------------------------
def spending(rounds) -> np.ndarray:
    """Share of the level spent at each round: proportional to the round's draws.

    The draws double from round to round, so the last round, which has the most draws and
    decides the hard cases, gets about half of the level; the union bound over rounds keeps
    the total at the level (any shares summing to 1 would).

    Examples
    --------
    >>> spending([64, 128, 256]).round(3).tolist()
    [0.143, 0.286, 0.571]
    """
    r = np.asarray(rounds, dtype=float)
    return r / r.sum()


def two_sided_p(excess: np.ndarray, error: np.ndarray, df) -> np.ndarray:
    """p-values of |bias estimate| beyond the reference's error: 2 P(T > excess / error).

    A zero standard error (identical draws) gives 0 where excess > 0 and 1 elsewhere.
    """
    excess = np.maximum(excess, 0.0)
    p = np.ones_like(excess)
    spread = error > 0
    for d in np.unique(np.asarray(df)[spread]):
        at = spread & (np.asarray(df) == d)
        p[at] = np.minimum(2.0 * t_tail(excess[at] / error[at], float(d)), 1.0)
    p[~spread & (excess > 0)] = 0.0
    return p


def bias_p_values(bias: np.ndarray, reference_error: np.ndarray, s: Summary) -> np.ndarray:
    """p-value per coordinate of "no bias", the reference's own error allowed for.

    Under no bias |mean - exact| >= |bias| - reference_error whenever the reference error
    bound holds, so the test of the excess is conservative.  Heavy-tailed coordinates keep
    the larger of the t and the batch-means p-values.
    """
    excess = np.abs(bias) - reference_error
    p = two_sided_p(excess, s.t_error, s.df)
    if s.robust.any():
        at = s.robust
        p_batch = two_sided_p(excess[at], s.batch_error[at], np.full(int(at.sum()), GROUPS - 1.0))
        p[at] = np.maximum(p[at], p_batch)
    return p


def holm(p: np.ndarray, alpha: float) -> np.ndarray:
    """Holm's step-down rejections at family-wise level alpha (NaN p-values are not tested).

    Sort the m p-values; reject the j-th smallest (j = 1..m) while every one up to it is
    at most alpha / (m - j + 1) (Holm 1979).

    Examples
    --------
    >>> holm(np.array([0.001, 0.02, 0.5]), 0.05).tolist()
    [True, True, False]
    """
    p = np.asarray(p, dtype=float)
    tested = np.flatnonzero(np.isfinite(p))
    reject = np.zeros(p.shape, dtype=bool)
    m = tested.size
    order = tested[np.argsort(p[tested], kind="stable")]
    for j, k in enumerate(order):
        if p[k] > alpha / (m - j):
            break
        reject[k] = True
    return reject


@dataclass
class Widths:
    """Per coordinate: the half-width of the simultaneous interval (without the reference's
    error) and the bias that would be found with probability POWER (with it)."""
    half_width: np.ndarray
    detectable: np.ndarray


def widths(alpha_each: float, s: Summary, reference_error: np.ndarray) -> Widths:
    """Interval half-widths at two-sided alpha_each and the smallest detectable biases.

    A bias beta is rejected when |estimate| - e > q s, so it is missed with probability at
    most 1 - POWER when beta >= e + (q + q_power) s, q_power the one-sided t quantile at
    1 - POWER (the usual power calculation of the t test, normal approximation to the
    noncentral t; e.g. NIST/SEMATECH e-Handbook, section 7.2.2.2).  Heavy-tailed
    coordinates take the wider of the t and the batch-means versions.
    """
    crit = _quantiles(alpha_each / 2.0, s.df)
    power = _quantiles(1.0 - POWER, s.df)
    half = crit * s.t_error
    detect = (crit + power) * s.t_error
    if s.robust.any():
        at = s.robust
        q_b = t_quantile(alpha_each / 2.0, GROUPS - 1.0)
        p_b = t_quantile(1.0 - POWER, GROUPS - 1.0)
        half[at] = np.fmax(half[at], q_b * s.batch_error[at])
        detect[at] = np.fmax(detect[at], (q_b + p_b) * s.batch_error[at])
    return Widths(half, detect + reference_error)


def _quantiles(p: float, df: np.ndarray) -> np.ndarray:
    out = np.empty(df.shape)
    for d in np.unique(df):
        out[df == d] = t_quantile(p, float(d))
    return out


def effective_error(s: Summary) -> np.ndarray:
    """The standard error behind a row's interval: batch means where those are wider."""
    return np.where(s.robust, np.fmax(s.batch_error, s.t_error), s.t_error)
