"""Which tracks follow the static world: the camera's motion, not a subject's.

A subject crossing the frame (a person, a car, a boat) can hold most of one
frame pair's tracks, so a per-pair robust fit may follow it. The world's
motion is the one that stays consistent *over time*, so the choice is made
across the pairs of a shot:

1. **Hypotheses per pair.** RANSAC (Fischler & Bolles, 1981) with the motion
   model's own one-pair fit (`MotionKind.pair_inliers`) finds the dominant
   motion; run again on the tracks it left, it finds the next (sequential
   RANSAC; Vincent & Laganière, 2001), up to three.
2. **One consistent chain.** Each hypothesis is summarised by its median
   displacement. A Viterbi pass (dynamic programming over the pairs) picks
   one hypothesis per pair, maximising the share of tracks explained while
   paying for every jump of the displacement from one pair to the next
   beyond what a camera's acceleration allows. A subject that moves
   differently from the world cannot be joined to the world's chain without
   a jump, so the chain with the larger support *over the whole shot* wins.
3. **A track's history.** Features keep their identity from frame to frame
   (`PairObservations.ids`); a track that sided with a rejected hypothesis
   once stays suspect, and counts for little when the chain is chosen again
   (a second pass).
4. **A prior from before.** A streamed clip's previous window predicts where
   the world's tracks of the overlapping pairs go; hypotheses that agree get
   a bonus, so the choice does not flip at a window border.

When the chosen chain explains less than `WEAK_SUPPORT` of the tracks on
average, or has to jump, the result says so (a warning the pipeline shows).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from skewfix.models.base import PointsMemo

MAX_HYPOTHESES = 3
_HYPOTHESES = PointsMemo()
MIN_SHARE = 0.1  # a hypothesis must hold this share of a pair's tracks (and 6 at least)
JUMP_WEIGHT = 0.6  # cost of a displacement jump of one tolerance unit, in shares of tracks
WEAK_SUPPORT = 0.4
SUSPECT_WEIGHT = 0.25  # how much a once-rejected track counts for in support
PRIOR_WEIGHT = 1.0
PRIOR_TOLERANCE_PX = 3.0
SAME_MOTION = 0.5  # hypotheses closer than this many jump tolerances are one motion
RIVAL_SHARE = 0.2  # a smooth rival motion this large makes a jump of the chain worth a warning


@dataclass
class Hypothesis:
    mask: np.ndarray  # bool (n,)
    displacement: np.ndarray  # median (dx, dy) of its tracks


@dataclass
class BackgroundChoice:
    """Per usable pair, 0/1 weights of the tracks taken for the static world."""

    weights: list[np.ndarray]
    support: float  # mean share of tracks explained
    jumps: list[int] = field(default_factory=list)  # pair indices k where the chain had to jump
    warning: str = ""


def hypotheses(kind, p0: np.ndarray, p1: np.ndarray) -> list[Hypothesis]:
    """Up to `MAX_HYPOTHESES` motions of one pair by sequential RANSAC (found once per pair and
    kind of inlier test: the result is a function of the points alone, read-only)."""
    return _HYPOTHESES.get((kind.inlier_key(), p0, p1), lambda: _sequential_ransac(kind, p0, p1))


def _sequential_ransac(kind, p0: np.ndarray, p1: np.ndarray) -> list[Hypothesis]:
    import cv2

    n = len(p0)
    cv2.setRNGSeed(n)  # RANSAC draws from OpenCV's shared generator: the same pair gives the same answer
    left = np.ones(n, bool)
    out: list[Hypothesis] = []
    need = max(6, int(np.ceil(MIN_SHARE * n)))
    for _ in range(MAX_HYPOTHESES):
        idx = np.flatnonzero(left)
        if len(idx) < need:
            break
        w = kind.pair_inliers(p0[idx], p1[idx])
        if w is None or w.sum() < need:
            break
        mask = np.zeros(n, bool)
        mask[idx[w > 0]] = True
        out.append(Hypothesis(mask, np.median(p1[mask] - p0[mask], axis=0)))
        left &= ~mask
    if not out:  # nothing coherent: every track, as before
        out.append(Hypothesis(np.ones(n, bool), np.median(p1 - p0, axis=0)))
    # one motion that RANSAC split (a rolling shutter bends a fast pan's tracks apart by row) is
    # one hypothesis: those whose displacements agree within half a jump tolerance are merged
    merged: list[Hypothesis] = []
    for h in out:
        same = next((m for m in merged if _jump(m.displacement, h.displacement, 1) < SAME_MOTION), None)
        if same is None:
            merged.append(h)
        else:
            same.mask = same.mask | h.mask
            same.displacement = np.median(p1[same.mask] - p0[same.mask], axis=0)
    return merged


def _jump(a: np.ndarray, b: np.ndarray, gap: int) -> float:
    """A displacement change in units of what a camera may do between pairs ``gap`` apart."""
    tolerance = gap * (2.0 + 0.25 * max(np.hypot(*a), np.hypot(*b)))
    return float(np.hypot(*(a - b)) / tolerance)


def _viterbi(pair_ks, hyps, support) -> list[int]:
    """Index of the chosen hypothesis per pair, maximising support minus jump costs."""
    n = len(hyps)
    if n == 0:
        return []
    score = [np.array(support[0])]
    back = [np.zeros(len(hyps[0]), int)]
    for i in range(1, n):
        gap = max(1, pair_ks[i] - pair_ks[i - 1])
        prev = score[-1]
        cur = np.empty(len(hyps[i]))
        arg = np.empty(len(hyps[i]), int)
        for j, h in enumerate(hyps[i]):
            cost = [prev[m] - JUMP_WEIGHT * max(0.0, _jump(g.displacement, h.displacement, gap) - 1.0)
                    for m, g in enumerate(hyps[i - 1])]
            arg[j] = int(np.argmax(cost))
            cur[j] = cost[arg[j]] + support[i][j]
        score.append(cur)
        back.append(arg)
    path = [int(np.argmax(score[-1]))]
    for i in range(n - 1, 0, -1):
        path.append(int(back[i][path[-1]]))
    return path[::-1]


def choose_background(kind, pairs, prior=None) -> BackgroundChoice:
    """The tracks of each pair that follow the static world (see the module docstring).

    ``pairs`` are one shot's usable pairs in order; ``prior(k, p0) -> p1`` (or None)
    predicts the world's tracks of pair ``k`` from an earlier fit.
    """
    hyps = [hypotheses(kind, p.p0, p.p1) for p in pairs]
    ks = [p.k for p in pairs]
    suspect: set[int] = set()
    path: list[int] = []
    for _round in range(2):
        support = []
        for p, hs in zip(pairs, hyps):
            count = np.ones(len(p.p0))
            if p.ids is not None and suspect:
                count[np.isin(p.ids, list(suspect))] = SUSPECT_WEIGHT
            total = max(float(count.sum()), 1.0)
            s = np.array([count[h.mask].sum() / total for h in hs])
            if prior is not None:
                predicted = prior(p.k, p.p0)
                if predicted is not None:
                    close = np.hypot(*(predicted - p.p1).T) < PRIOR_TOLERANCE_PX
                    s = s + PRIOR_WEIGHT * np.array([close[h.mask].mean() if h.mask.any() else 0.0 for h in hs])
            support.append(s)
        path = _viterbi(ks, hyps, support)
        suspect = set()
        for p, hs, j in zip(pairs, hyps, path):
            if p.ids is not None:
                for m, h in enumerate(hs):
                    if m != j:
                        suspect.update(p.ids[h.mask].tolist())
        if not suspect:
            break
    weights, shares, jumps = [], [], []
    forced = 0  # transitions where the chosen chain itself jumps
    for i, (p, hs, j) in enumerate(zip(pairs, hyps, path)):
        w = hs[j].mask.astype(np.float64)
        if p.ids is not None and suspect:
            w[np.isin(p.ids, list(suspect))] = 0.0
        if w.sum() < 4:
            w = hs[j].mask.astype(np.float64)
        weights.append(w)
        shares.append(hs[j].mask.mean())
        if i > 0:
            # a jump matters when the chain took it although another motion of the pair went on smoothly
            before, gap = hyps[i - 1][path[i - 1]].displacement, max(1, ks[i] - ks[i - 1])
            size = _jump(before, hs[j].displacement, gap)
            forced += size > 2.0  # beyond twice the tolerance: more than a whip pan's acceleration
            if size > 1.0 and any(
                    _jump(before, h.displacement, gap) <= 1.0 and h.mask.mean() >= RIVAL_SHARE
                    for m, h in enumerate(hs) if m != j):
                jumps.append(p.k)
    support_mean = float(np.mean(shares)) if shares else 0.0
    warning = ""
    erratic = len(pairs) > 2 and forced > 0.25 * (len(pairs) - 1)
    if pairs and (support_mean < WEAK_SUPPORT or jumps or erratic):
        where = f"; it jumps {max(len(jumps), forced)} time(s)" if jumps or erratic else ""
        warning = (f"no motion consistent over time explains most tracks (on average {support_mean * 100:.0f} % "
                   f"of them{where}): a large subject may have been taken for the world, check the result")
    return BackgroundChoice(weights, support_mean, jumps, warning)
