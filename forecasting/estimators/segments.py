"""Multi-task averaging within segments: customers of the same segment are taken to be more alike."""

from __future__ import annotations

import numpy as np

from forecasting.errors import OrderDataError
from forecasting.estimators.base import ONE_CUSTOMER, Shrunk, as_arrays, plain_result
from forecasting.holdout import CHUNK_CELLS


def segment_similarities(means, codes, n_segments):
    """Closed-form within- and between-segment similarities, O(T).

    Returns ``(a_within, a_between, within_pairs, between_pairs)`` with
    a = 2 / (mean over the ordered pairs of (m_r - m_s)^2); NaN when there are
    no such pairs, inf when all those pairs agree exactly.

    Notes
    -----
    Pair sums without pair loops: within segment g the ordered pairs sum to
    2 n_g SS_g; between segments g != h they sum to
    n_h SS_g + n_g SS_h + n_g n_h (mean_g - mean_h)^2, which summed over
    g != h is 2 sum_g SS_g (T - n_g) + 2 T sum_g n_g (mean_g - mean)^2.
    Every term is a sum of squares, so nothing cancels.
    """
    m = np.asarray(means, dtype=np.float64)
    T = m.size
    size = np.bincount(codes, minlength=n_segments).astype(np.float64)
    seg_mean = np.bincount(codes, weights=m, minlength=n_segments) / np.maximum(size, 1.0)
    dev = m - seg_mean[codes]
    seg_ss = np.bincount(codes, weights=dev * dev, minlength=n_segments)
    grand = float(np.mean(m))
    within_sum = float(np.sum(2.0 * size * seg_ss))
    within_pairs = float(np.sum(size * (size - 1.0)))
    between_sum = float(2.0 * np.sum(seg_ss * (T - size)) + 2.0 * T * np.sum(size * (seg_mean - grand) ** 2))
    between_pairs = float(T * (T - 1.0) - within_pairs)

    def _similarity(total, pairs):
        if pairs == 0:
            return float("nan")
        return 2.0 * pairs / total if total > 0 else float("inf")

    return _similarity(within_sum, within_pairs), _similarity(between_sum, between_pairs), within_pairs, between_pairs


def _segment_solve(m, s, codes, n_segments, a_within, a_between):
    """Solve (I + (1/T) S L) y = m for block similarities by Woodbury; O(T G + G^3).

    Returns the estimates y and the diagonal of W = (I + (1/T) S L)^-1.
    """
    T = m.size
    G = n_segments
    size = np.bincount(codes, minlength=G).astype(np.float64)
    B = np.full((G, G), a_between)
    np.fill_diagonal(B, a_within)
    # D = diag(A 1) with A = U B U^T: row sums a_w n_g + a_b (T - n_g)
    degree = (a_within * size + a_between * (T - size))[codes]
    delta = 1.0 + s * degree / T
    inv_delta = 1.0 / delta
    # K = I_G - U^T Delta^-1 P B with U^T Delta^-1 P = diag(h), h_g = sum_{t in g} s_t / (T Delta_t).
    h = np.bincount(codes, weights=s * inv_delta / T, minlength=G)
    K = -h[:, None] * B
    # Diagonal 1 - h_g a_w written as a mean of positive terms, so it stays accurate when a_w is huge.
    between_part = 1.0 + s * a_between * (T - size[codes]) / T
    K[np.diag_indices(G)] = np.bincount(codes, weights=between_part * inv_delta, minlength=G) / np.maximum(size, 1.0)
    rhs = np.bincount(codes, weights=m * inv_delta, minlength=G)  # U^T Delta^-1 m
    w = np.linalg.solve(K, rhs)  # the segments' sums of estimates
    Bw = B @ w
    y = inv_delta * (m + s * Bw[codes] / T)
    # diag(W)_t = 1/Delta_t + (s_t / T) (B K^-1)_{g(t) g(t)} / Delta_t^2
    BKinv = np.linalg.solve(K.T, B.T).T
    diag = inv_delta + (s / T) * np.diag(BKinv)[codes] * inv_delta * inv_delta
    return y, np.clip(diag, 0.0, 1.0)


def mta_segments(means, mean_vars, *, segments, a_within=None, a_between=None) -> Shrunk:
    """Multi-task averaging with block similarity: customers in the same segment are more alike.

    Parameters
    ----------
    means, mean_vars : array_like
        m_t and s_t.
    segments : array_like
        Segment label of each customer.
    a_within, a_between : float, optional
        Similarities within and between segments; by default the closed
        forms of :func:`segment_similarities`, with a_between clipped to at
        most a_within.

    Returns
    -------
    Shrunk
        ``params``: ``a_within``, ``a_between``, ``segments``.

    Notes
    -----
    A = U B U^T with U the T x G segment indicator, B_gg = a_w, B_gh = a_b.
    With D = diag(A 1), Delta = I + (1/T) S D and P = (1/T) S U,
    I + (1/T) S L = Delta - P B U^T and Woodbury gives
    y = Delta^-1 m + Delta^-1 P B w, (I_G - U^T Delta^-1 P B) w = U^T Delta^-1 m,
    where w turns out to be each segment's sum of estimates. The own-history
    weight is the diagonal of W = (I + (1/T) S L)^-1,
    W_tt = 1/Delta_t + (s_t/T) (B K^-1)_gg / Delta_t^2, O(T + G^3). (For
    constant similarity, :func:`mta_constant` reports 1/(1 + a s_t), which is
    1/Delta_t; the diagonal of W adds the customer's small share in the centre.)
    The centre reported is sum_t (y_t - g_t m_t) / sum_t (1 - g_t), the
    average point customers are pulled toward. v_t = g_t s_t.
    An infinite similarity (all averages in the segment equal) is replaced by
    one with a s_t = 1e12 for the noisiest customer: the same estimates to
    about 12 digits.

    References
    ----------
    Feldman, S., Gupta, M. R. and Frigyik, B. A. (2014). Revisiting Stein's
    paradox: multi-task averaging. JMLR 15, 3621-3662.
    """
    m, s = as_arrays(means, mean_vars)
    if segments is None:
        raise OrderDataError(
            "the 'mta-segments' method needs a segment for every customer",
            fix="Name the column that holds each customer's segment, or choose another method", role="segment",
        )
    labels = np.asarray(segments)
    if labels.shape != m.shape:
        raise ValueError(f"segments must have one label per customer (got {labels.shape} for {m.shape[0]} customers)")
    if not np.issubdtype(labels.dtype, np.integer):
        labels = labels.astype(str)
    names, codes = np.unique(labels, return_inverse=True)
    G = names.size
    T = m.size
    notes = []
    if T == 1:
        return plain_result(m, s, (ONE_CUSTOMER,))
    auto_w, auto_b, within_pairs, between_pairs = segment_similarities(m, codes, G)
    a_w = auto_w if a_within is None else float(a_within)
    a_b = auto_b if a_between is None else float(a_between)
    if np.isnan(a_b):  # one segment: no between pairs, the value does not matter
        a_b = 0.0
        notes.append("All customers are in one segment, so this is ordinary multi-task averaging.")
    if np.isnan(a_w):  # every segment has one customer
        a_w = a_b
        notes.append("Every segment has a single customer; customers are compared across segments only.")
    if a_b > a_w:
        a_b = a_w
        notes.append("Customers in different segments looked more alike than customers in the same segment; "
                     "the between-segment similarity was lowered to the within-segment one.")
    params = {"a_within": float(a_w), "a_between": float(a_b), "segments": float(G)}
    if np.all(m == m[0]):
        g = np.zeros_like(m)
        return Shrunk(m.copy(), g, float(m[0]), g * s, tuple(notes), params)
    s_max = float(np.max(s))
    if s_max == 0:
        return plain_result(
            m, s, tuple(notes) + ("Every customer's average has zero spread, so there is nothing to shrink.",), params)
    cap = 1e12 / s_max
    y, g = _segment_solve(m, s, codes, G, min(a_w, cap), min(a_b, cap))
    free = float(np.sum(1.0 - g))
    centre = float(np.sum(y - g * m) / free) if free > 0 else float(np.mean(m))
    return Shrunk(y, g, centre, g * s, tuple(notes), params)


def mta_segments_left_out(side, s_factor, *, segments, **context):
    """Leave-one-out twin of :func:`mta_segments`, exactly (s_t = s_factor / n_t).

    The similarities a_w (within segments) and a_b (between) come from sums
    per segment of the averages and their squares, updated in O(G) per
    held-out order.  The Woodbury solve of
    :func:`mta_segments` needs, per segment, sums over
    its customers of functions of n_s only (s_s = s_factor / n_s), so customers
    are grouped by (segment, order count); the held-out customer moves from
    cell (g, n) to (g, n - 1).  Then one G x G solve per held-out order
    (batched).  Cost O(N (G K' + G^3)), K' the number of (segment, count)
    cells.
    """
    scale, sigma2, segment = side, np.asarray(s_factor, dtype=np.float64), segments
    H = scale.H
    T = scale.T
    t = scale.t
    own = segment[t]
    G = int(segment.max()) + 1
    if T == 1:
        return scale.d_after, np.ones(H)
    size = np.bincount(segment, minlength=G).astype(np.float64)
    s1 = np.bincount(segment, weights=scale.d, minlength=G)
    s2 = np.bincount(segment, weights=scale.d * scale.d, minlength=G)
    change = scale.d_after - scale.d_before
    s1_own = s1[own] + change
    s2_own = s2[own] + scale.d_after**2 - scale.d_before**2
    with np.errstate(invalid="ignore", divide="ignore"):
        ss = np.maximum(s2 - s1 * s1 / size, 0.0)  # spread of the averages within each segment
        ss_own = np.maximum(s2_own - s1_own * s1_own / size[own], 0.0)
        square_means = s1 * s1 / size
        square_own = s1_own * s1_own / size[own]
    ss = np.where(size > 0, ss, 0.0)
    square_means = np.where(size > 0, square_means, 0.0)
    within_pairs = float(np.sum(size * (size - 1.0)))
    between_pairs = float(T * (T - 1.0) - within_pairs)
    within_sum = float(np.sum(2.0 * size * ss)) + 2.0 * size[own] * (ss_own - ss[own])
    grand = scale.unweighted_centre_after()
    spread_of_means = float(np.sum(square_means)) + square_own - square_means[own] - T * grand * grand
    between_sum = (2.0 * (float(np.sum(ss * (T - size))) + (ss_own - ss[own]) * (T - size[own]))
                   + 2.0 * T * np.maximum(spread_of_means, 0.0))

    def similarity(total, pairs):
        if pairs == 0:
            return np.full(H, np.nan)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(total > 0, 2.0 * pairs / total, np.inf)

    a_w = similarity(within_sum, within_pairs)
    a_b = similarity(between_sum, between_pairs)
    a_b = np.where(np.isnan(a_b), 0.0, a_b)
    a_w = np.where(np.isnan(a_w), a_b, a_w)
    a_b = np.minimum(a_b, a_w)
    n_min = np.minimum(float(scale.counts.min()), scale.n - 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        cap = n_min * 1e12 / sigma2  # a s_max = 1e12 at most
    a_w = np.minimum(a_w, cap)
    a_b = np.minimum(a_b, cap)

    # Cells (segment, order count) with their number of customers and sum of d.
    base = int(scale.counts.max()) + 1
    cell_key, cell_of = np.unique(segment * base + scale.counts.astype(np.int64), return_inverse=True)
    cell_seg = cell_key // base
    cell_n = (cell_key % base).astype(np.float64)
    cell_count = np.bincount(cell_of, minlength=len(cell_key)).astype(np.float64)
    cell_sum = np.bincount(cell_of, weights=scale.d, minlength=len(cell_key))
    to_segment = np.zeros((len(cell_key), G))
    to_segment[np.arange(len(cell_key)), cell_seg] = 1.0

    estimate = np.empty(H)
    weight = np.empty(H)
    rows_per_block = max(1, CHUNK_CELLS // max(1, len(cell_key)))
    for start in range(0, H, rows_per_block):
        rows = slice(start, min(H, start + rows_per_block))
        r = np.arange(rows.start, rows.stop)
        sg2, aw, ab = sigma2[rows], a_w[rows], a_b[rows]
        degree_of = lambda seg, aw=aw, ab=ab: aw[:, None] * size[seg] + ab[:, None] * (T - size[seg])  # noqa: E731
        s_cell = sg2[:, None] / cell_n[None, :]
        delta = 1.0 + s_cell * degree_of(cell_seg) / T
        h = (cell_count * s_cell / (T * delta)) @ to_segment
        between = 1.0 + s_cell * ab[:, None] * (T - size[cell_seg]) / T
        diag_sum = (cell_count * between / delta) @ to_segment
        rhs = (cell_sum / delta) @ to_segment
        # Move the held-out customer from cell (g, n) with d to (g, n - 1) with d'.
        g_own = own[rows]
        n_old, n_new = scale.n[rows], scale.n[rows] - 1.0
        deg_own = aw * size[g_own] + ab * (T - size[g_own])
        for n_cell, d_cell, sign in ((n_old, scale.d_before[rows], -1.0), (n_new, scale.d_after[rows], 1.0)):
            s_t = sg2 / n_cell
            delta_t = 1.0 + s_t * deg_own / T
            idx = (np.arange(len(r)), g_own)  # one cell per row, so plain fancy-index adds are safe
            h[idx] += sign * s_t / (T * delta_t)
            diag_sum[idx] += sign * (1.0 + s_t * ab * (T - size[g_own]) / T) / delta_t
            rhs[idx] += sign * d_cell / delta_t
        B = np.repeat(ab[:, None, None], G, axis=1).repeat(G, axis=2)
        B[:, np.arange(G), np.arange(G)] = aw[:, None]
        K = -h[:, :, None] * B
        K[:, np.arange(G), np.arange(G)] = diag_sum / np.maximum(size, 1.0)[None, :]
        w = np.linalg.solve(K, rhs[:, :, None])[:, :, 0]
        Bw = np.einsum("rgh,rh->rg", B, w)
        s_t = sg2 / n_new
        delta_t = 1.0 + s_t * deg_own / T
        y = (scale.d_after[rows] + s_t * Bw[np.arange(len(r)), g_own] / T) / delta_t
        unit = np.zeros((len(r), G, 1))
        unit[np.arange(len(r)), g_own, 0] = 1.0
        column = np.linalg.solve(K, unit)[:, :, 0]  # K^-1 e_g
        bk = np.einsum("rh,rh->r", B[np.arange(len(r)), g_own, :], column)  # (B K^-1)_gg
        estimate[rows] = y
        weight[rows] = np.clip(1.0 / delta_t + (s_t / T) * bk / (delta_t * delta_t), 0.0, 1.0)

    # Degenerate cases handled as the full fit does.
    all_equal = scale.var_means_after() == 0
    plain = ~(sigma2 > 0)
    estimate = np.where(all_equal | plain, scale.d_after, estimate)
    weight = np.where(all_equal, 0.0, np.where(plain, 1.0, weight))
    return estimate, weight
