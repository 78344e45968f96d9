#!/usr/bin/env python3
"""Exact (rational) evaluation and minimisation for tests/reference/fp_stress.py.

Only Python's standard `fractions` and integer arithmetic decide anything
here; float() appears only to round a rational to its nearest double (which
CPython does correctly) and math.nextafter to step between doubles.

Exact semantics
---------------
Every number written is a double, hence a rational; the model is the real
function x -> logits with (x - mean) / std computed exactly. The class is the
index of the largest logit, ties to the lower index; a one-output model is the
two-logit model (0, logit) under the same rule (class 1 iff logit > 0). The
region of a case is {x : |x_i - c_i| <= eps} ∩ [lower, upper] (L-inf) or
{x : sum (x_i - c_i)^2 <= eps^2} ∩ [lower, upper] (L2), with c the sample and
eps the double of the case, all in exact arithmetic. The verdict is
    not_robust     some real x of the region has another class,
    robust         every real x of the region keeps the class with a margin
                   l_y - l_j > 0 for every j != y,
    robust_at_tie  the class is kept but only thanks to the tie rule (some
                   l_j = l_y with j > y is reached; no sound bound can prove it
                   with a positive margin, so a certifier may leave it open).

Method (why the minimum is exact)
---------------------------------
For every other class j, g_j(x) = l_y(x) - l_j(x) is continuous and piecewise
affine. Fix an activation pattern P of all hidden units; the set Q_P of box
points whose pre-activations have the signs of P (non-strict) is a bounded
convex polytope, defined by the box faces, the first hidden layer's
hyperplanes (affine in x) and, given the first layer's pattern, the second
hidden layer's hyperplanes (affine in x on Q_P as well). On Q_P the network is
affine, so min over Q_P of g_j is attained at a vertex of Q_P (fundamental
theorem of linear programming; Q_P lies in a box, so it has vertices when
non-empty). The box is the union of the Q_P, so the minimum over the box is
the minimum of g_j over all vertices of all Q_P. A vertex of Q_P is a point of
the box where n linearly independent constraints of Q_P are tight (n <= 3 is
the input size), so the script solves every n x n system formed by n of
those hyperplanes (integer Cramer's rule, exact), keeps the solutions lying in
the box and consistent with the first layer's pattern, and evaluates the
network exactly (Fractions) at them. Evaluating the true network at extra box
points cannot lower the minimum below the true one, and every true vertex is
among the points, so the minimum found is the exact minimum. Units whose
pre-activation keeps one sign over the whole box add no hyperplane (their
piece is the same on the whole box); with one hidden layer there is no second
layer to enumerate and the candidates are the vertices of the arrangement of
box faces and first-layer hyperplanes.

L2: a Euclidean ball is not a polytope and its minimiser can be irrational,
so L2 verdicts are exact only where they are certain:
  * one-input models: the ball is the interval [c - eps, c + eps], exact;
  * 2-3 inputs: the ball lies inside the L-inf box of radius eps and contains
    the box of radius q*eps with q a rational <= 1/sqrt(n). Robust on the
    outer box => robust on the ball; not robust on the inner box => not robust
    on the ball (the witness lies in the inner box). Cases between the two are
    marked "undetermined" and carry no assertion.

Flipping doubles
----------------
For a case that is not robust, the script rounds the minimising vertices (the
most negative first) to the doubles within two ulps in every coordinate,
keeps those inside the region exactly, and evaluates the network exactly at
them; the first vertex giving a class change in exact arithmetic supplies the
recorded double point (the one of lowest exact margin). The same point is also
evaluated by a plain float64 numpy forward pass layer by layer, normalize
unfolded, to show the deployed float64 answer. A real-valued counterexample
without a flipping double is common when std is tiny and the mean huge: the
doubles near 1e8 lie 1.5e-8 apart, a step of 0.016 in normalised units.
"""
import itertools
import math
from fractions import Fraction

# q <= 1/sqrt(n) for the inner box of an L2 ball in n dimensions: isqrt(N^2 / n) / N.
_Q_SCALE = 1 << 64
INNER_Q = {n: Fraction(math.isqrt(_Q_SCALE * _Q_SCALE // n), _Q_SCALE) for n in (1, 2, 3)}


# ---------------------------------------------------------------------------
# Exact model
# ---------------------------------------------------------------------------


class ExactModel:
    """The model as a real function: first affine map in raw-input units, then ReLU / affine."""

    def __init__(self, spec):
        self.spec = spec
        self.n = len(spec["mean"])
        mean = [Fraction(v) for v in spec["mean"]]
        std = [Fraction(v) for v in spec["std"]]
        dense = [([[Fraction(w) for w in row] for row in W], [Fraction(v) for v in b]) for W, b in spec["dense"]]
        W1, b1 = dense[0]
        A = [[W1[k][i] / std[i] for i in range(self.n)] for k in range(len(W1))]
        c = [b1[k] - sum(W1[k][i] * mean[i] / std[i] for i in range(self.n)) for k in range(len(W1))]
        self.layers = [(A, c)] + dense[1:]
        self.outputs = len(dense[-1][1])
        self.lower = [None if v is None else Fraction(v) for v in spec["lower"]]
        self.upper = [None if v is None else Fraction(v) for v in spec["upper"]]

    def hidden_count(self):
        return len(self.layers) - 1

    def logits(self, x):
        h = x
        for li, (W, b) in enumerate(self.layers):
            h = [sum((w * v for w, v in zip(row, h)), Fraction(0)) + bb for row, bb in zip(W, b)]
            if li < len(self.layers) - 1:
                h = [v if v > 0 else Fraction(0) for v in h]
        return effective_logits(h)


def effective_logits(raw):
    """A one-output model is the two-logit model (0, logit) under the lower-index tie rule."""
    return [Fraction(0), raw[0]] if len(raw) == 1 else raw


def exact_class(logits):
    best = 0
    for j in range(1, len(logits)):
        if logits[j] > logits[best]:
            best = j
    return best


# ---------------------------------------------------------------------------
# Exact minimisation over a box (vertex enumeration)
# ---------------------------------------------------------------------------


def int_plane(a, beta):
    """a·x + beta (Fractions) scaled to integers by the common denominator (positive scale)."""
    den = 1
    for v in list(a) + [beta]:
        den = math.lcm(den, v.denominator)
    return tuple(int(v * den) for v in a), int(beta * den)


def affine_range(a, beta, lo, hi):
    low = beta + sum(ai * (l if ai > 0 else h) for ai, l, h in zip(a, lo, hi))
    high = beta + sum(ai * (h if ai > 0 else l) for ai, l, h in zip(a, lo, hi))
    return low, high


def det(m):
    n = len(m)
    if n == 1:
        return m[0][0]
    if n == 2:
        return m[0][0] * m[1][1] - m[0][1] * m[1][0]
    return (
        m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
        - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
        + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
    )


def solve(planes):
    """Intersection of n integer hyperplanes a·x + beta = 0 as (numerators, denominator > 0), or None."""
    m = [list(a) for a, _ in planes]
    rhs = [-beta for _, beta in planes]
    d = det(m)
    if d == 0:
        return None
    nums = []
    for i in range(len(m)):
        mi = [row[:i] + [r] + row[i + 1:] for row, r in zip(m, rhs)]
        nums.append(det(mi))
    if d < 0:
        d, nums = -d, [-v for v in nums]
    return tuple(nums), d


def side(plane, point):
    """Sign of a·x + beta at a point given as (numerators, denominator > 0)."""
    (a, beta), (nums, d) = plane, point
    v = sum(ai * ni for ai, ni in zip(a, nums)) + beta * d
    return (v > 0) - (v < 0)


def box_candidates(model, lo, hi):
    """Exact points of the box [lo, hi] containing every vertex of every activation-pattern polytope."""
    n = model.n
    box = []
    for i in range(n):
        e = [Fraction(int(k == i)) for k in range(n)]
        box.append(int_plane(e, -lo[i]))  # x_i - lo_i >= 0
        box.append(int_plane([-v for v in e], hi[i]))  # hi_i - x_i >= 0
    A, c = model.layers[0]
    free, fixed = [], {}
    for k, (a, beta) in enumerate(zip(A, c)):
        low, high = affine_range(a, beta, lo, hi)
        if low < 0 < high:
            free.append(k)
        else:
            fixed[k] = high > 0
    l1 = {k: int_plane(A[k], c[k]) for k in free}
    points = set()

    def inside(p):
        return all(side(h, p) >= 0 for h in box)

    def collect(planes, must_use):
        for combo in itertools.combinations(range(len(planes)), n):
            if must_use is not None and not any(i >= must_use for i in combo):
                continue
            p = solve([planes[i] for i in combo])
            if p is not None and inside(p):
                yield p

    base = box + [l1[k] for k in free]
    for p in collect(base, None):
        points.add(p)
    if model.hidden_count() == 2:
        W2, b2 = model.layers[1]
        for pattern in itertools.product((False, True), repeat=len(free)):
            on = dict(fixed)
            on.update(zip(free, pattern))
            extra = []
            for row, bias in zip(W2, b2):
                a = [sum((row[k] * A[k][i] for k in on if on[k]), Fraction(0)) for i in range(n)]
                beta = bias + sum((row[k] * c[k] for k in on if on[k]), Fraction(0))
                if all(v == 0 for v in a):
                    continue
                low, high = affine_range(a, beta, lo, hi)
                if low <= 0 <= high:
                    extra.append(int_plane(a, beta))
            if not extra:
                continue
            for p in collect(base + extra, len(base)):
                if all(side(l1[k], p) * (1 if on[k] else -1) >= 0 for k in free):
                    points.add(p)
    out = []
    for nums, d in sorted(points):
        out.append([Fraction(v, d) for v in nums])
    return out


def box_of(model, center, radius):
    lo, hi = [], []
    for i, c in enumerate(center):
        lo.append(c - radius if model.lower[i] is None else max(c - radius, model.lower[i]))
        hi.append(c + radius if model.upper[i] is None else min(c + radius, model.upper[i]))
    return lo, hi


class BoxResult:
    """Per other class j: exact minimum of l_y - l_j over the box and the candidate points by margin."""

    def __init__(self, model, center, radius, label):
        self.lo, self.hi = box_of(model, center, radius)
        pts = box_candidates(model, self.lo, self.hi)
        self.scored = []  # (phi at point, point, logits)
        self.minima = {}
        for p in pts:
            logits = model.logits(p)
            margins = {j: logits[label] - logits[j] for j in range(len(logits)) if j != label}
            for j, m in margins.items():
                if j not in self.minima or m < self.minima[j]:
                    self.minima[j] = m
            self.scored.append((min(margins.values()), p))
        self.scored.sort(key=lambda t: t[0])
        self.phi = min(self.minima.values())
        self.label = label

    def spot_check(self, model, rng, count=48):
        """Self-check: no corner and no random grid point of the box lies below the minima found."""
        points = [list(p) for p in itertools.product(*zip(self.lo, self.hi))]
        for _ in range(count):
            points.append([l + (h - l) * Fraction(int(rng.integers(0, 1025)), 1024) for l, h in zip(self.lo, self.hi)])
        for p in points:
            logits = model.logits(p)
            for j, m in self.minima.items():
                assert logits[self.label] - logits[j] >= m, "a box point lies below the vertex minimum"
        return len(points)

    def verdict(self):
        changes = any(m < 0 or (m == 0 and j < self.label) for j, m in self.minima.items())
        if changes:
            return "not_robust"
        return "robust" if self.phi > 0 else "robust_at_tie"


# ---------------------------------------------------------------------------
# Flipping doubles and the deployed float64 answer
# ---------------------------------------------------------------------------


def neighbours(v, ulps=2):
    f = float(v)  # correctly rounded
    out = [f]
    lo = hi = f
    for _ in range(ulps):
        lo, hi = math.nextafter(lo, -math.inf), math.nextafter(hi, math.inf)
        out += [lo, hi]
    return sorted(set(out))


def in_region(model, center, eps, norm, x):
    for i, v in enumerate(x):
        fv = Fraction(v)
        if model.lower[i] is not None and fv < model.lower[i]:
            return False
        if model.upper[i] is not None and fv > model.upper[i]:
            return False
    d = [Fraction(v) - c for v, c in zip(x, center)]
    if norm == "linf":
        return all(abs(v) <= eps for v in d)
    return sum(v * v for v in d) <= eps * eps


def find_flip(model, center, eps, norm, label, scored, tries=10):
    for phi, p in scored[:tries]:
        if phi > 0:
            break
        best = None
        for x in itertools.product(*(neighbours(v) for v in p)):
            if not in_region(model, center, eps, norm, x):
                continue
            logits = model.logits([Fraction(v) for v in x])
            cls = exact_class(logits)
            if cls != label:
                margin = min(logits[label] - logits[j] for j in range(len(logits)) if j != label)
                if best is None or margin < best[0]:
                    best = (margin, list(x), cls)
        if best is not None:
            return best
    return None
