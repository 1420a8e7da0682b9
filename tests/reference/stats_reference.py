"""befit's calibration and drift figures recomputed with numpy, scipy and
scikit-learn from an export's vectors, for test_stats.py to compare.

Each function follows the definition in docs/statistics.md, written the
plain numpy way rather than mirroring the Rust code.
"""

import math

import numpy as np
from scipy import linalg, stats
from sklearn.isotonic import IsotonicRegression
from sklearn.metrics import roc_auc_score, roc_curve

QUANTILE_LEVELS = [0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99]
QUANTILE_NAMES = ["p01", "p05", "p25", "p50", "p75", "p95", "p99"]

# Leaves of a calibration report fixed by the probe and options, left out of
# a drift report's "changes" (docs/statistics.md, "changes").
FIXED_FIGURES = {"margin", "batch_images", "batches", "dropped_images", "positives", "queries", "count"}


class Vectors:
    """One bundle's exported vectors and labels as numpy arrays."""

    def __init__(self, raw):
        self.raw = raw
        self.images = np.asarray(raw["images"], dtype=np.float64)
        self.captions = np.asarray(raw["captions"], dtype=np.float64)
        d = self.images.shape[1]
        self.contrasts = np.asarray(raw["contrasts"], dtype=np.float64).reshape(-1, d)
        self.caption_image = np.asarray(raw["caption_image"], dtype=np.intp)
        self.contrast_from = np.asarray(raw["contrast_from"], dtype=np.intp)
        self.labels = list(raw["contrast_labels"])
        # einsum without BLAS sums every entry in the same order, so equal rows
        # (a caption text shared by two images) give exactly equal cosines, as
        # they do in befit; a BLAS kernel may round edge tiles differently.
        self.s = np.einsum("nd,md->nm", self.images, self.captions)
        m = self.captions.shape[0]
        self.true_cos = self.s[self.caption_image, np.arange(m)]
        own_images = self.images[self.caption_image[self.contrast_from]]
        self.contrast_cos = np.einsum("kd,kd->k", own_images, self.contrasts)

    @property
    def n(self):
        return self.images.shape[0]

    @property
    def m(self):
        return self.captions.shape[0]

    def texts(self):
        return np.vstack([self.captions, self.contrasts])


def round_range(values):
    """docs/statistics.md, "Histograms": the smallest step of 1, 2 or 5 times
    a power of ten that cuts max - min into at most 10 steps; the multiples
    of it at or below the smallest and at or above the largest cosine, within
    [-1, 1]."""
    lo, hi = float(np.min(values)), float(np.max(values))
    for exponent in range(-6, 10):
        step = next((m * 10.0**exponent for m in (1, 2, 5) if (hi - lo) / (m * 10.0**exponent) <= 10), None)
        if step is not None:
            break
    decimals = max(0, 1 - math.floor(math.log10(step)))
    low = round(math.floor(lo / step + 1e-9) * step, decimals)
    high = round(math.ceil(hi / step - 1e-9) * step, decimals)
    if high <= low:
        high = round(low + step, decimals)
    low, high = max(low, -1.0), min(high, 1.0)
    if low >= high:
        low, high = (1.0 - step, 1.0) if high >= 1.0 else (-1.0, -1.0 + step)
    return low, high


def wilson(k, n, scale=1.0):
    """scipy's Wilson score interval (no continuity correction), 95 %."""
    if n == 0:
        return None
    ci = stats.binomtest(int(k), int(n)).proportion_ci(confidence_level=0.95, method="wilson")
    return {"low": float(ci.low) * scale, "high": float(ci.high) * scale}


def roc(t, c):
    """scikit-learn's ROC of true cosines (positives) against contrast cosines."""
    y = np.concatenate([np.ones(len(t)), np.zeros(len(c))])
    scores = np.concatenate([t, c])
    fpr, tpr, _ = roc_curve(y, scores, drop_intermediate=False)
    return {"auc": float(roc_auc_score(y, scores)), "points": [[float(a), float(b)] for a, b in zip(fpr, tpr)]}


def distribution(x, bins, rng):
    x = np.asarray(x, dtype=np.float64)
    low, high = rng
    counts, _ = np.histogram(np.clip(x, low, high), bins=bins, range=(low, high))
    q = np.quantile(x, QUANTILE_LEVELS)  # method="linear", numpy's default
    return {
        "count": int(x.size),
        "mean": float(np.mean(x)),
        "std": float(np.std(x, ddof=0)),
        "min": float(np.min(x)),
        "max": float(np.max(x)),
        "quantiles": dict(zip(QUANTILE_NAMES, map(float, q))),
        "histogram": {"low": low, "high": high, "counts": [int(c) for c in counts]},
    }


def hinge_figures(v, images, margin):
    """VSE++ SH and MH (Faghri et al. 2018, eq. 1-2) over `images` and their captions."""
    images = np.asarray(images, dtype=np.intp)
    caps = np.nonzero(np.isin(v.caption_image, images))[0]
    owner = v.caption_image[caps]
    pos = v.s[owner, caps]
    # Caption negatives of pair p: captions q of another image, s(owner_p, q).
    sc = v.s[np.ix_(owner, caps)]
    hc = np.clip(margin - pos[:, None] + sc, 0.0, None)
    hc[owner[:, None] == owner[None, :]] = 0.0
    # Image negatives of pair p: images j other than owner_p, s(j, caption_p).
    si = v.s[np.ix_(images, caps)].T
    hi = np.clip(margin - pos[:, None] + si, 0.0, None)
    hi[owner[:, None] == images[None, :]] = 0.0
    sh_c, sh_i = hc.sum(axis=1), hi.sum(axis=1)
    mh_c = hc.max(axis=1) if hc.shape[1] else np.zeros(len(caps))
    mh_i = hi.max(axis=1) if hi.shape[1] else np.zeros(len(caps))
    return {
        "positives": int(len(caps)),
        "sum_of_hinges": float(np.mean(sh_c + sh_i)),
        "sum_of_hinges_caption_negatives": float(np.mean(sh_c)),
        "sum_of_hinges_image_negatives": float(np.mean(sh_i)),
        "max_of_hinges": float(np.mean(mh_c + mh_i)),
        "max_of_hinges_caption_negatives": float(np.mean(mh_c)),
        "max_of_hinges_image_negatives": float(np.mean(mh_i)),
        "violation_rate": float(np.mean((mh_c > 0) | (mh_i > 0))),
        "violation_rate_caption_negatives": float(np.mean(mh_c > 0)),
        "violation_rate_image_negatives": float(np.mean(mh_i > 0)),
    }


def hinge_report(v, margin, batch_images):
    whole = hinge_figures(v, np.arange(v.n), margin)
    full = v.n // batch_images
    if full == 0:
        batches, dropped = [np.arange(v.n)], 0
    else:
        batches = [np.arange(b * batch_images, (b + 1) * batch_images) for b in range(full)]
        dropped = v.n - full * batch_images
    per = [hinge_figures(v, b, margin) for b in batches]
    mean = {k: float(np.mean([f[k] for f in per])) for k in per[0] if k != "positives"}
    mean["positives"] = sum(f["positives"] for f in per)
    return {
        "margin": margin,
        "whole_set": whole,
        "batched": {"batch_images": batch_images, "batches": len(per), "dropped_images": dropped, "mean": mean},
    }


def retrieval_figures(ranks):
    ranks = np.asarray(ranks, dtype=np.float64)
    hits = {k: int(np.sum(ranks <= k)) for k in (1, 5, 10)}
    return {
        "intervals": {f"r_at_{k}": wilson(hits[k], ranks.size, 100.0) for k in (1, 5, 10)},
        "queries": int(ranks.size),
        "r_at_1": 100.0 * float(np.mean(ranks <= 1)),
        "r_at_5": 100.0 * float(np.mean(ranks <= 5)),
        "r_at_10": 100.0 * float(np.mean(ranks <= 10)),
        "median_rank": float(np.median(ranks)),
        "mean_rank": float(np.mean(ranks)),
    }


def retrieval_report(v):
    # A competitor ranks above the true item only with a strictly greater cosine.
    best = np.full(v.n, -np.inf)
    np.maximum.at(best, v.caption_image, v.true_cos)
    i2t = 1 + (v.s > best[:, None]).sum(axis=1)
    t2i = 1 + (v.s > v.true_cos[None, :]).sum(axis=0)
    a, b = retrieval_figures(i2t), retrieval_figures(t2i)
    rsum = sum(a[k] + b[k] for k in ("r_at_1", "r_at_5", "r_at_10"))
    return {"image_to_text": a, "text_to_image": b, "rsum": rsum}


def contrast_figures(t, c):
    t, c = np.asarray(t), np.asarray(c)
    if t.size == 0:
        return {"count": 0, "wins": 0, "ties": 0, "rate": None, "mean_gap": None, "rate_interval": None, "auc": None}
    return {
        "rate_interval": wilson(np.sum(t > c), t.size),
        "auc": roc(t, c)["auc"],
        "count": int(t.size),
        "wins": int(np.sum(t > c)),
        "ties": int(np.sum(t == c)),
        "rate": float(np.mean(t > c)),
        "mean_gap": float(np.mean(t - c)),
    }


def contrast_report(v):
    t = v.true_cos[v.contrast_from]
    labels = np.asarray(v.labels, dtype=object)
    by_label, curves = {}, {}
    for label in sorted(set(v.labels)):
        mask = labels == label
        by_label[label] = contrast_figures(t[mask], v.contrast_cos[mask])
        curves[label] = roc(t[mask], v.contrast_cos[mask])
    return {"overall": contrast_figures(t, v.contrast_cos), "by_label": by_label, "roc": curves}


def cosine_range(*vs):
    """The histogram range of a report: every image-caption and contrast cosine."""
    return round_range(np.concatenate([np.concatenate([v.s.ravel(), v.contrast_cos]) for v in vs]))


EXAMPLE_PAIRS = 8


def examples(v):
    """docs/statistics.md, `examples`: lowest true pairs; contrasts not beaten."""
    raw = v.raw

    def pair(c):
        i = int(v.caption_image[c])
        return {"image": raw["image_names"][i], "image_line": raw["image_lines"][i],
                "caption": raw["caption_texts"][c], "true_cos": float(v.true_cos[c])}

    lowest = [pair(int(c)) for c in np.lexsort((np.arange(v.m), v.true_cos))[:EXAMPLE_PAIRS]]
    t = v.true_cos[v.contrast_from]
    gap = t - v.contrast_cos
    lost_idx = np.nonzero(gap <= 0)[0]
    lost_idx = lost_idx[np.lexsort((lost_idx, gap[lost_idx]))][:EXAMPLE_PAIRS]
    lost = []
    for k in lost_idx:
        p = pair(int(v.contrast_from[k]))
        p.update({"contrast": raw["contrast_texts"][k], "changed": raw["contrast_labels"][k],
                  "contrast_cos": float(v.contrast_cos[k])})
        lost.append(p)
    return {"lowest_true": lowest, "lost_contrasts": lost}


def calibration(v, options, rng):
    """`rng` is the histogram range befit used, checked against
    cosine_range by the caller, so that bin edges are the same doubles."""
    bins = options["histogram_bins"]
    own = v.caption_image[None, :] == np.arange(v.n)[:, None]
    negatives = np.where(own, -np.inf, v.s)
    hardest = negatives.max(axis=1)[v.caption_image]
    cosines = {
        "true_pairs": distribution(v.true_cos, bins, rng),
        "hardest_negatives": distribution(hardest, bins, rng),
        "all_negatives": distribution(v.s[~own], bins, rng),
        "contrasts": distribution(v.contrast_cos, bins, rng) if v.contrast_cos.size else None,
    }
    m_t = float(np.quantile(v.true_cos, 0.5))
    m_h = float(np.quantile(hardest, 0.5))
    affine = None
    if m_t > m_h:
        a = 1.0 / (m_t - m_h)
        affine = {"a": a, "b": -a * m_h}
    return {
        "bundle": v.raw["bundle"],
        "counts": {
            "images": v.n,
            "captions": v.m,
            "contrasts": int(v.contrasts.shape[0]),
            "dimension": int(v.images.shape[1]),
        },
        "hinge": hinge_report(v, options["margin"], options["batch_images"]),
        "cosines": cosines,
        "retrieval": retrieval_report(v),
        "contrast": contrast_report(v),
        "examples": examples(v),
        "suggested": {
            "median_true": m_t,
            "median_hardest_negative": m_h,
            "affine": affine,
            "clip_s_weight": 1.0 / m_t if m_t > 0 else None,
        },
    }


def nan_to_none(x):
    x = float(x)
    return None if np.isnan(x) else x


def agreement(a, b):
    return {
        "pairs": int(len(a)),
        "spearman_rho": nan_to_none(stats.spearmanr(a, b).statistic),
        "kendall_tau_b": nan_to_none(stats.kendalltau(a, b, variant="b").statistic),
    }


def linear_cka(x, y):
    """Kornblith et al. 2019, linear CKA with centred columns."""
    x = x - x.mean(axis=0)
    y = y - y.mean(axis=0)
    num = np.linalg.norm(y.T @ x, "fro") ** 2
    den = np.linalg.norm(x.T @ x, "fro") * np.linalg.norm(y.T @ y, "fro")
    return None if den == 0 else float(num / den)


def procrustes(a, b):
    if a.shape[1] != b.shape[1]:
        return None
    r, _ = linalg.orthogonal_procrustes(a, b)
    residual = float(np.linalg.norm(a @ r - b, "fro"))
    return {"residual": residual, "normalised_residual": residual / float(np.linalg.norm(b, "fro"))}


def top_k(row, k):
    # By decreasing cosine, ties by caption index.
    order = np.lexsort((np.arange(row.size), -row))
    return set(order[:k].tolist())


def mean_jaccard(sa, sb, k):
    values = []
    for ra, rb in zip(sa, sb):
        ta, tb = top_k(ra, k), top_k(rb, k)
        values.append(len(ta & tb) / len(ta | tb))
    return float(np.mean(values))


def fit_errors(predicted, y):
    e = np.asarray(predicted) - np.asarray(y)
    return float(np.sqrt(np.mean(e * e))), float(np.max(np.abs(e)))


def affine_fit(x, y):
    a, b = np.polyfit(x, y, 1)
    rmse, max_error = fit_errors(a * x + b, y)
    return {"a": float(a), "b": float(b), "rmse": rmse, "max_error": max_error}


def isotonic(x, y):
    ir = IsotonicRegression(increasing=True, out_of_bounds="clip").fit(x, y)
    rmse, max_error = fit_errors(ir.predict(x), y)
    return ir, rmse, max_error


def flatten(report, prefix=""):
    """The measured numbers of a calibration report by dotted name."""
    out = {}

    def walk(value, path):
        if isinstance(value, dict):
            for key, v in value.items():
                if key == "histogram" or key in FIXED_FIGURES:
                    continue
                walk(v, f"{path}.{key}")
        elif value is None:
            out[path] = None
        elif isinstance(value, (int, float)) and not isinstance(value, bool):
            out[path] = float(value)

    for section in ("hinge", "cosines", "retrieval", "contrast", "suggested"):
        walk(report[section], section)
    return out
