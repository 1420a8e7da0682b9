"""Cross-check of befit's calibration and drift figures against numpy, scipy
(spearmanr, kendalltau, ks_2samp, kstwobign, orthogonal_procrustes) and
scikit-learn (IsotonicRegression), to 1e-6.

Order: `cargo test` runs tests/stats_export.rs, which writes the exports
(vectors, labels, options and befit's report) to $BEFIT_EXPORT_DIR or
target/stats-export/; then `pytest tests/reference` recomputes every figure
from the exported vectors. A missing export is a failure, not a skip.
"""

import json
import math
import os
import pathlib

import numpy as np
import pytest
from scipy import stats

import stats_reference as ref

ROOT = pathlib.Path(__file__).resolve().parents[2]
EXPORT_DIR = pathlib.Path(os.environ.get("BEFIT_EXPORT_DIR", ROOT / "target" / "stats-export"))
TOL = 1e-6


def exports(kind):
    return sorted(EXPORT_DIR.glob(f"{kind}-*.json"))


def load(path):
    with open(path) as f:
        data = json.load(f)
    assert data["format"] == "befit-stats-export", path
    assert data["version"] == 1, f"{path}: export version {data['version']}, this test knows 1"
    return data


def assert_close(actual, expected, path="report"):
    """Every field of `expected` is in `actual`: numbers within TOL, the rest equal."""
    if isinstance(expected, dict):
        assert isinstance(actual, dict), f"{path}: {actual!r} is not an object"
        for key, value in expected.items():
            assert key in actual, f"{path}.{key} missing from befit's report"
            assert_close(actual[key], value, f"{path}.{key}")
    elif isinstance(expected, list):
        assert isinstance(actual, list) and len(actual) == len(expected), f"{path}: {actual!r} != {expected!r}"
        for i, (a, e) in enumerate(zip(actual, expected)):
            assert_close(a, e, f"{path}[{i}]")
    elif expected is None:
        assert actual is None, f"{path}: befit {actual!r}, reference None"
    elif isinstance(expected, bool) or isinstance(expected, str):
        assert actual == expected, f"{path}: befit {actual!r}, reference {expected!r}"
    elif isinstance(expected, int):
        assert actual == expected, f"{path}: befit {actual!r}, reference {expected!r}"
    else:
        assert actual is not None, f"{path}: befit null, reference {expected!r}"
        assert math.isclose(actual, expected, rel_tol=0, abs_tol=TOL), (
            f"{path}: befit {actual!r}, reference {expected!r} (diff {actual - expected:.3g})"
        )


def test_exports_exist():
    # Failing here, not skipping, keeps a broken export step from passing silently.
    for kind in ("calibration", "drift"):
        assert exports(kind), (
            f"no {kind}-*.json export in {EXPORT_DIR}: run `cargo test --test stats_export` "
            "first (it writes them), or set BEFIT_EXPORT_DIR to where it wrote them"
        )


def test_exported_vectors_are_unit_length():
    for path in exports("calibration") + exports("drift"):
        data = load(path)
        for side in [k for k in ("vectors", "from", "to") if k in data]:
            v = ref.Vectors(data[side])
            for name, m in (("images", v.images), ("captions", v.captions), ("contrasts", v.contrasts)):
                if m.size:
                    np.testing.assert_allclose(np.linalg.norm(m, axis=1), 1.0, atol=1e-12, err_msg=f"{path} {side} {name}")


def histogram_range(report, expected, path):
    """befit's histogram range, after checking it is the documented round
    range; every distribution of a report shares it."""
    ranges = {(d["histogram"]["low"], d["histogram"]["high"]) for d in report["cosines"].values() if d}
    assert len(ranges) == 1, f"{path}: histograms over different ranges {ranges}"
    (low, high), = ranges
    assert_close([low, high], list(expected), f"{path} histogram range")
    return low, high


@pytest.mark.parametrize("path", exports("calibration"), ids=lambda p: p.stem)
def test_calibration_matches_reference(path):
    data = load(path)
    v = ref.Vectors(data["vectors"])
    rng = histogram_range(data["report"], ref.cosine_range(v), "report")
    expected = ref.calibration(v, data["options"], rng)
    assert_close(data["report"], expected)


@pytest.mark.parametrize("path", exports("drift"), ids=lambda p: p.stem)
def test_drift_calibrations_match_reference(path):
    data = load(path)
    options = data["options"]["calibration"]
    report = data["report"]
    a, b = ref.Vectors(data["from"]), ref.Vectors(data["to"])
    # One range over both bundles' cosines, so the histograms share bins.
    rng = histogram_range(report["from"], ref.cosine_range(a, b), "report.from")
    assert histogram_range(report["to"], rng, "report.to") == rng
    assert_close(report["from"], ref.calibration(a, options, rng), "report.from")
    assert_close(report["to"], ref.calibration(b, options, rng), "report.to")


def test_round_range_examples():
    # Worked by hand (docs/statistics.md, "Histograms"), the same as the unit
    # test in src/stats/summary.rs: the reference's own definition is right.
    assert ref.round_range([0.31, 0.97]) == (0.3, 1.0)
    assert ref.round_range([0.12, 0.215]) == (0.12, 0.22)
    assert ref.round_range([-0.93, 0.98]) == (-1.0, 1.0)


def pair_cosines(data):
    a, b = ref.Vectors(data["from"]), ref.Vectors(data["to"])
    cos_a = np.concatenate([a.true_cos, a.contrast_cos])
    cos_b = np.concatenate([b.true_cos, b.contrast_cos])
    return a, b, cos_a, cos_b


@pytest.mark.parametrize("path", exports("drift"), ids=lambda p: p.stem)
def test_rank_agreement_and_ks_match_scipy(path):
    data = load(path)
    a, b, cos_a, cos_b = pair_cosines(data)
    report = data["report"]
    assert_close(
        report["counts"],
        {
            "images": a.n,
            "captions": a.m,
            "contrasts": int(a.contrasts.shape[0]),
            "pairs": int(cos_a.size),
            "dimension_from": int(a.images.shape[1]),
            "dimension_to": int(b.images.shape[1]),
        },
        "report.counts",
    )
    assert (report["from_bundle"], report["to_bundle"]) == (data["from"]["bundle"], data["to"]["bundle"])
    assert_close(
        report["agreement"],
        {"all_pairs": ref.agreement(cos_a, cos_b), "true_pairs": ref.agreement(a.true_cos, b.true_cos)},
        "report.agreement",
    )
    ks = stats.ks_2samp(a.true_cos, b.true_cos)
    n, m = a.true_cos.size, b.true_cos.size
    en = n * m / (n + m)
    assert_close(
        report["true_cosine_ks"],
        {
            "n_from": n,
            "n_to": m,
            "statistic": float(ks.statistic),
            "p_value_asymptotic": float(stats.kstwobign.sf(math.sqrt(en) * ks.statistic)),
        },
        "report.true_cosine_ks",
    )


@pytest.mark.parametrize("path", exports("drift"), ids=lambda p: p.stem)
def test_spaces_match_numpy_cka_and_scipy_procrustes(path):
    data = load(path)
    a, b, _, _ = pair_cosines(data)
    report = data["report"]
    assert_close(
        report["cka"],
        {"images": ref.linear_cka(a.images, b.images), "texts": ref.linear_cka(a.texts(), b.texts())},
        "report.cka",
    )
    assert_close(
        report["procrustes"],
        {"images": ref.procrustes(a.images, b.images), "texts": ref.procrustes(a.texts(), b.texts())},
        "report.procrustes",
    )
    k = min(data["options"]["neighbour_k"], a.m)
    assert_close(
        report["neighbour_overlap"],
        {"k": k, "mean_jaccard": ref.mean_jaccard(a.s, b.s, k)},
        "report.neighbour_overlap",
    )


@pytest.mark.parametrize("path", exports("drift"), ids=lambda p: p.stem)
def test_continuity_maps_match_polyfit_and_sklearn_isotonic(path):
    data = load(path)
    _, _, cos_a, cos_b = pair_cosines(data)
    fits = data["report"]["continuity"]

    affine = ref.affine_fit(cos_b, cos_a)
    assert fits["affine"]["map"]["kind"] == "affine"
    assert_close(
        fits["affine"],
        {
            "map": {"a": affine["a"], "b": affine["b"]},
            "pairs": int(cos_a.size),
            "rmse": affine["rmse"],
            "max_error": affine["max_error"],
        },
        "continuity.affine",
    )

    ir, rmse, max_error = ref.isotonic(cos_b, cos_a)
    monotone = fits["monotone"]
    assert monotone["map"]["kind"] == "monotone"
    knots = np.asarray(monotone["map"]["knots"], dtype=np.float64)
    assert np.all(np.diff(knots[:, 0]) > 0) and np.all(np.diff(knots[:, 1]) >= 0), "knots out of order"
    assert_close(monotone, {"pairs": int(cos_a.size), "rmse": rmse, "max_error": max_error}, "continuity.monotone")
    # Knots may differ where two blocks have equal means (merged or not), so
    # compare the functions: at every fitted x and on a grid past both ends.
    grid = np.concatenate([cos_b, np.linspace(cos_b.min() - 0.1, cos_b.max() + 0.1, 2001)])
    befit_map = np.interp(grid, knots[:, 0], knots[:, 1])
    np.testing.assert_allclose(befit_map, ir.predict(grid), atol=TOL, rtol=0)


@pytest.mark.parametrize("path", exports("drift"), ids=lambda p: p.stem)
def test_moved_pairs_scatter_and_changes(path):
    data = load(path)
    a, _, cos_a, cos_b = pair_cosines(data)
    report = data["report"]
    affine = ref.affine_fit(cos_b, cos_a)
    mapped = affine["a"] * cos_b + affine["b"] - cos_a
    order = np.lexsort((np.arange(mapped.size), -np.abs(mapped)))
    top = order[: data["options"]["moved_pairs"]]

    moved = report["moved"]
    assert len(moved) == len(top)
    # Exact ties in |mapped| may be broken differently by a last-bit rounding
    # difference, so compare the ranked values, then each pair on its own.
    assert_close([abs(p["mapped_delta"]) for p in moved], [float(abs(mapped[i])) for i in top], "moved |mapped_delta|")
    raw = data["from"]
    m = a.m
    for p in moved:
        i = p["pair"]
        assert_close(
            p,
            {
                "cos_from": float(cos_a[i]),
                "cos_to": float(cos_b[i]),
                "raw_delta": float(cos_b[i] - cos_a[i]),
                "mapped_delta": float(mapped[i]),
            },
            f"moved pair {i}",
        )
        if i < m:
            assert (p["kind"], p["changed"], p["true_caption"]) == ("true", None, None)
            assert p["caption"] == raw["caption_texts"][i]
            image = raw["caption_image"][i]
        else:
            k = i - m
            origin = raw["contrast_from"][k]
            assert (p["kind"], p["changed"]) == ("contrast", raw["contrast_labels"][k])
            assert p["caption"] == raw["contrast_texts"][k]
            assert p["true_caption"] == raw["caption_texts"][origin]
            image = raw["caption_image"][origin]
        assert (p["image"], p["image_line"]) == (raw["image_names"][image], raw["image_lines"][image])

    scatter = report["scatter"]
    kept = range(0, cos_a.size, scatter["stride"]) if scatter["stride"] else []
    assert_close(scatter["points"], [[float(cos_b[i]), float(cos_a[i])] for i in kept], "scatter")
    assert len(scatter["points"]) <= data["options"]["scatter_points"]

    before, after = ref.flatten(report["from"]), ref.flatten(report["to"])
    expected = {}
    for name in sorted(set(before) | set(after)):
        f, t = before.get(name), after.get(name)
        if f is None and t is None:
            continue
        expected[name] = {"from": f, "to": t, "delta": None if f is None or t is None else t - f}
    assert set(report["changes"]) == set(expected)
    assert_close(report["changes"], expected, "changes")
