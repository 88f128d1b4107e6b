"""Figures: every kind draws, bytes are stable, large n stays cheap, the look is our own.

The fitted blocks here are built from patsy design matrices and the project's
``fit_model``/``compute_influence``; where those are not available the arrays
come from statsmodels (the reference implementation) and closed forms.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from premises.checks.base import CheckContext
from premises.errors import DataError, SpecError
from premises.figures import (
    FIGURE_KINDS,
    collinearity,
    draw_figures,
    find_flags,
    independence,
    normality,
    partial,
    plan_figures,
    variance,
)
from premises.figures.base import bin_means, evaluate_threshold, make_cloud
from premises.figures.layers import render_to_file
from premises.figures.style import COLOURS, LARGE_N, MAX_QUANTILES
from premises.fit import FitResult, Influence
from premises.formula import Design
from premises.results import FigureRef, Finding, FlaggedPoint, Statistic
from premises.spec import BlockSpec, FigureOptions

DATA = Path(__file__).parent / "data"
# The four panel titles of a common statistics environment's diagnostic grid, kept only as
# hashes of their lower-cased words so the project's text never carries them.
CLASSIC_TITLE_HASHES = frozenset(
    {"1c6d23efaaef7eab9a44", "acc5045bb3d3271238da", "95ed97153b2b5016bfe9", "c5ac3b97bb59dd9c8cf1"}
)


def _uses_classic_title(text: str) -> bool:
    """True when any run of 2-3 words in ``text`` hashes to one of the classic titles."""
    import hashlib
    import re

    words = re.findall(r"[a-z0-9_]+", text.lower())
    for size in (2, 3):
        for i in range(len(words) - size + 1):
            digest = hashlib.sha256(" ".join(words[i : i + size]).encode()).hexdigest()[:20]
            if digest in CLASSIC_TITLE_HASHES:
                return True
    return False


# ----------------------------------------------------------------------- builders


def make_design(formula: str, frame: pd.DataFrame) -> Design:
    """A Design from patsy (the project's build_design may not exist yet)."""
    import patsy

    y, X = patsy.dmatrices(formula, frame, return_type="dataframe", NA_action="raise")
    info = X.design_info
    slices = tuple((name, s.start, s.stop) for name, s in info.term_name_slices.items())
    names = set(frame.columns)
    uses = tuple(
        (name, tuple(c for c in re.findall(r"[A-Za-z_][A-Za-z_0-9]*", name) if c in names))
        for name, _, _ in slices
    )
    lhs = formula.split("~")[0].strip()
    return Design(
        formula=formula,
        outcome=lhs,
        outcome_columns=tuple(c for c in re.findall(r"[A-Za-z_]\w*", lhs) if c in names),
        predictor_columns=tuple(sorted({c for _, cols in uses for c in cols})),
        y=y.to_numpy()[:, 0],
        X=X.to_numpy(),
        column_names=tuple(info.column_names),
        term_slices=slices,
        term_columns=uses,
        has_intercept="Intercept" in info.column_names,
    )


def fit_and_measure(design: Design) -> tuple[FitResult, Influence]:
    """The project's fit and influence, or statsmodels arrays where those are missing."""
    try:
        from premises.fit import compute_influence, fit_model

        fit = fit_model(design)
        return fit, compute_influence(fit)
    except (NotImplementedError, ImportError):
        return _statsmodels_fit(design)


def _statsmodels_fit(design: Design) -> tuple[FitResult, Influence]:
    """FitResult/Influence from statsmodels OLS; leave-one-out measures by closed form."""
    import statsmodels.api as sm

    res = sm.OLS(design.y, design.X).fit()
    n, p = design.X.shape
    infl = res.get_influence()
    h = infl.hat_matrix_diag
    undefined = h > 1 - 1e-10
    r = np.where(undefined, np.nan, infl.resid_studentized_internal)
    t = r * np.sqrt((n - p - 1) / (n - p - r**2))
    s_i = np.sqrt(((n - p) * res.scale - res.resid**2 / (1 - h)) / (n - p - 1))
    xtx_inv = res.normalized_cov_params
    shift = (design.X @ xtx_inv) * (res.resid / (1 - h))[:, None]
    dfbetas = shift / (s_i[:, None] * np.sqrt(np.diag(xtx_inv))[None, :])
    dfbetas[undefined] = np.nan
    fit = FitResult(
        design=design,
        params=res.params,
        cov=res.cov_params(),
        resid=res.resid,
        fitted=res.fittedvalues,
        weights=None,
        sigma2=float(res.scale),
        df_resid=float(res.df_resid),
        rank=int(res.df_model + 1),
        condition_number=1.0,
        r_squared=float(res.rsquared),
        r_squared_adj=float(res.rsquared_adj),
        f_statistic=None,
        f_p=None,
        xtx_inv=xtx_inv,
    )
    influence = Influence(
        hat=h,
        studentized_internal=r,
        studentized_external=t,
        cooks=np.where(undefined, np.nan, infl.cooks_distance[0]),
        dffits=t * np.sqrt(h / (1 - h)),
        dfbetas=dfbetas,
        undefined=undefined,
    )
    return fit, influence


def synthetic_frame(n: int, seed: int = 7, groups: int = 12) -> pd.DataFrame:
    """Plots with a curved effect of water, spread growing with it, site effects, 2 outliers."""
    rng = np.random.default_rng(seed)
    water = rng.uniform(1, 10, n)
    ph = rng.normal(6.5, 0.6, n)
    site = rng.choice(list("abcd"), n)
    block = rng.integers(0, groups, n)
    day = np.arange(1, n + 1)
    wave = np.sin(day / max(n / 6, 1)) * 0.8
    noise = rng.normal(0, 0.5 + 0.15 * water, n)
    effect = {"a": 0.0, "b": 0.7, "c": -0.4, "d": 0.2}
    y = 3 + 0.9 * water - 0.06 * water**2 + 1.1 * ph + np.vectorize(effect.get)(site)
    y = y + wave + noise + rng.normal(0, 0.6, groups)[block]
    y[3] += 9.0
    y[n // 2] -= 7.0
    return pd.DataFrame(
        {
            "plot_id": [f"P{i:04d}" for i in range(1, n + 1)],
            "yield_t": y,
            "water": water,
            "ph": ph,
            "site": site,
            "block": [f"B{b:02d}" for b in block],
            "day": day,
        }
    )


def make_context(
    n: int = 180,
    *,
    formula: str = "yield_t ~ water + ph + C(site)",
    id_column: str | None = "plot_id",
    order: str | None = "day",
    groups: str | None = "block",
    frame: pd.DataFrame | None = None,
    seed: int = 20240601,
) -> CheckContext:
    """A fitted block over ``synthetic_frame`` (or ``frame``)."""
    frame = synthetic_frame(n) if frame is None else frame
    design = make_design(formula, frame)
    fit, influence = fit_and_measure(design)
    spec = BlockSpec(
        id="growth",
        data="plots.csv",
        model=formula,
        id_column=id_column,
        order=order,
        groups=groups,
        seed=seed,
    )
    ids = (
        frame[id_column].astype(str)
        if id_column
        else pd.Series(range(1, len(frame) + 1)).astype(str)
    ).to_numpy()
    rows = np.arange(1, len(frame) + 1)
    return CheckContext(spec, fit, influence, frame.reset_index(drop=True), ids, rows, seed)


def make_findings(verdict: str = "concern") -> tuple[Finding, ...]:
    """One finding per assumption with a measure, as the checks would write them."""
    measures = {
        "linearity": ("share of residual variance a smooth explains", 0.042),
        "normality": ("largest envelope excess", 0.31),
        "variance": ("spread ratio, top to bottom third", 1.83),
        "influence": ("largest coefficient shift (SE)", 0.74),
        "independence": ("lag-1 autocorrelation", 0.2),
        "collinearity": ("largest VIF", 1.2),
    }
    return tuple(
        Finding(assumption=a, verdict=verdict, measure=Statistic(name, value))  # type: ignore[arg-type]
        for a, (name, value) in measures.items()
    )


def all_texts(fig: Any) -> list[str]:
    """Every text on a figure: titles, labels, tick labels, annotations, legend entries."""
    from matplotlib.text import Text

    return [t.get_text() for t in fig.findobj(Text) if t.get_text()]


def annotations(fig: Any) -> list[str]:
    """Texts of the annotations (point labels and line notes) on a figure."""
    from matplotlib.text import Annotation

    return [t.get_text() for t in fig.findobj(Annotation)]


def drawn(kind_name: str, ctx: CheckContext, findings: tuple[Finding, ...]) -> list[Any]:
    """Draw every planned figure of one kind into bare Figures (no files)."""
    import matplotlib

    from premises.figures.layers import new_figure
    from premises.figures.style import RC_PARAMS

    figs = []
    for planned in plan_figures(ctx, findings):
        if planned.kind.name == kind_name:
            with matplotlib.rc_context(RC_PARAMS):
                fig = new_figure(FigureOptions())
                planned.kind.draw(planned.data, fig)
                fig.canvas.draw()
            figs.append(fig)
    return figs


@pytest.fixture(scope="module")
def ctx() -> CheckContext:
    return make_context()


# --------------------------------------------------------------------------- tests


def test_every_kind_draws_with_caption_and_alt(ctx: CheckContext, tmp_path: Path) -> None:
    refs = draw_figures(ctx, make_findings(), tmp_path, "figures", FigureOptions())
    ids = [ref.id for ref in refs]
    assert ids == [
        "fig-growth-linearity",
        "fig-growth-partial-water",
        "fig-growth-partial-ph",
        "fig-growth-normality",
        "fig-growth-variance",
        "fig-growth-influence",
        "fig-growth-dfbetas",
        "fig-growth-independence",
        "fig-growth-collinearity",
    ]
    kinds_used = {planned.kind.name for planned in plan_figures(ctx, make_findings())}
    assert kinds_used == {kind.name for kind in FIGURE_KINDS}
    for ref in refs:
        assert isinstance(ref, FigureRef)
        assert ref.path == f"figures/{ref.id}.png"
        assert (tmp_path / f"{ref.id}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert "Verdict: concern;" in ref.caption
        assert ref.alt and ref.alt[0].isupper() and ref.alt.endswith(".")
    assert not list(tmp_path.glob("*.tmp")) and not list(tmp_path.glob(".*"))


def test_caption_carries_measure_and_alt_the_numbers(ctx: CheckContext, tmp_path: Path) -> None:
    refs = {r.id: r for r in draw_figures(ctx, make_findings(), tmp_path, "", FigureOptions())}
    linear = refs["fig-growth-linearity"]
    assert linear.path == "fig-growth-linearity.png"
    assert "share of residual variance a smooth explains = 0.0420" in linear.caption
    assert linear.alt.startswith("Scatter of 180 residuals against fitted values; ")
    assert re.search(r"the binned mean stays within [0-9.]+ residual SD of zero", linear.alt)
    # The two planted outliers are flagged and named by their id column value.
    assert "P0004" in linear.alt and "P0091" in linear.alt
    assert "1.83" in refs["fig-growth-variance"].caption


@pytest.mark.parametrize("fmt", ["png", "svg", "pdf"])
def test_bytes_are_identical_across_runs(ctx: CheckContext, tmp_path: Path, fmt: str) -> None:
    options = FigureOptions(format=fmt, dpi=80, width=5.0)
    first = draw_figures(ctx, make_findings(), tmp_path / "a", "f", options)
    second = draw_figures(ctx, make_findings(), tmp_path / "b", "f", options)
    assert [r.id for r in first] == [r.id for r in second]
    for ref in first:
        name = f"{ref.id}.{fmt}"
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name


def test_bytes_are_identical_in_a_fresh_process(ctx: CheckContext, tmp_path: Path) -> None:
    # A second interpreter rules out state carried inside one process (id counters, caches).
    formats = ("png", "svg", "pdf")
    code = _subprocess_code(tmp_path / "b", formats)
    subprocess.run([sys.executable, "-c", code], check=True, cwd=Path(__file__).parent)
    for fmt in formats:
        draw_figures(ctx, make_findings(), tmp_path / "a" / fmt, "f", FigureOptions(format=fmt))
        names = sorted(p.name for p in (tmp_path / "a" / fmt).iterdir())
        assert names == sorted(p.name for p in (tmp_path / "b" / fmt).iterdir())
        for name in names:
            first = (tmp_path / "a" / fmt / name).read_bytes()
            assert first == (tmp_path / "b" / fmt / name).read_bytes(), name


def _subprocess_code(out: Path, formats: tuple[str, ...], check_modules: bool = False) -> str:
    """A script that draws the standard block's figures in each format under ``out/<fmt>``."""
    lines = [
        "import sys; sys.path.insert(0, '.')",
        "from pathlib import Path",
        "import test_figures as t",
        "from premises.figures import draw_figures",
        "from premises.spec import FigureOptions",
        "ctx, findings = t.make_context(), t.make_findings()",
        f"for fmt in {formats!r}:",
        f"    draw_figures(ctx, findings, Path({str(out)!r}) / fmt, 'f', FigureOptions(format=fmt))",
    ]
    if check_modules:
        lines += [
            "assert 'matplotlib' in sys.modules",
            "assert 'matplotlib.pyplot' not in sys.modules, 'pyplot was imported'",
        ]
    return "\n".join(lines)


def test_pyplot_is_never_imported(tmp_path: Path) -> None:
    code = _subprocess_code(tmp_path, ("png",), check_modules=True)
    subprocess.run([sys.executable, "-c", code], check=True, cwd=Path(__file__).parent)
    assert len(list((tmp_path / "png").glob("*.png"))) == 9


def test_importing_figures_does_not_import_matplotlib() -> None:
    code = "import sys, premises.figures; assert 'matplotlib' not in sys.modules"
    subprocess.run([sys.executable, "-c", code], check=True)


def test_no_title_or_text_uses_the_classic_panel_titles(ctx: CheckContext) -> None:
    findings = make_findings()
    for kind in FIGURE_KINDS:
        for fig in drawn(kind.name, ctx, findings):
            for text in all_texts(fig):
                assert not _uses_classic_title(text), text
    for planned in plan_figures(ctx, findings):
        caption, alt = planned.kind.describe(planned.data, planned.finding)
        assert not _uses_classic_title(caption + " " + alt)


def _is_red(colour: str) -> bool:
    from matplotlib.colors import to_rgb

    r, g, b = to_rgb(colour)
    return r > 0.75 and g < 0.3 and b < 0.3


def test_palette_has_no_red() -> None:
    assert not [c for c in COLOURS.values() if _is_red(c)]
    assert not _is_red(COLOURS["flag"])  # vermillion (#D55E00) is not red
    assert _is_red("#ff0000") and _is_red("#e41a1c")  # the check itself can fail


def test_written_svgs_carry_no_red(ctx: CheckContext, tmp_path: Path) -> None:
    draw_figures(ctx, make_findings(), tmp_path, "f", FigureOptions(format="svg"))
    for path in tmp_path.glob("*.svg"):
        text = path.read_text()
        colours = set(re.findall(r"#[0-9a-fA-F]{6}\b", text))
        assert not [c for c in colours if _is_red(c)], path.name
        assert "stroke-dasharray" not in text, f"{path.name} has a dashed line"


def test_flagged_points_are_labelled_by_id(ctx: CheckContext) -> None:
    flags = find_flags(ctx, None)
    assert {"P0004", "P0091"} <= set(flags.labels)
    notes = annotations(drawn("linearity", ctx, make_findings())[0])
    assert {"P0004", "P0091"} <= set(notes)
    assert all(re.fullmatch(r"P\d{4}", note) for note in notes)  # ids, never row numbers


def test_labels_fall_back_to_row_numbers_without_id_column() -> None:
    ctx = make_context(id_column=None)
    labels = find_flags(ctx, None).labels
    assert "row 4" in labels and "row 91" in labels


def test_flags_come_from_the_influence_finding_when_listed(ctx: CheckContext) -> None:
    point = FlaggedPoint(
        id="P0010",
        row=10,
        leverage=0.1,
        studentized=1.0,
        cooks=0.01,
        dffits=0.1,
        dfbetas=(),
        rules=("cooks > 4/n",),
    )
    listed = (point, "P0020", {"id": "P0030", "row": 30}, {"row": 40})
    influence = Finding("influence", "concern", None, extra=(("flagged", listed),))
    flags = find_flags(ctx, influence)
    assert set(flags.labels) == {"P0010", "P0020", "P0030", "P0040"} and flags.total == 4
    # Severity order is Cook's distance, largest first.
    cooks = ctx.influence.cooks[flags.index]
    assert np.all(np.diff(cooks) <= 0)


def test_lines_come_from_the_finding_thresholds(ctx: CheckContext) -> None:
    from premises.figures import influence as influence_figure
    from premises.results import ThresholdUse

    uses = (
        ThresholdUse("Cook's distance", "1", 1.0, "Cook & Weisberg 1982"),
        ThresholdUse("leverage", "3p/n", 0.2, "Velleman & Welsch 1981"),
        ThresholdUse("|DFBETAS|", "1", 1.0, "declared"),
    )
    finding = Finding("influence", "holds", None, thresholds=uses)
    data = influence_figure.compute(ctx, finding)
    assert data is not None and data.cooks_cut == 1.0 and data.leverage_cut == 0.2
    # Without the finding's thresholds the block's expressions apply: 4/n and 2p/n.
    plain = influence_figure.compute(ctx, Finding("influence", "holds", None))
    assert plain is not None
    assert plain.cooks_cut == pytest.approx(4 / 180) and plain.leverage_cut == pytest.approx(
        2 * 6 / 180
    )


def test_large_n_switches_to_a_density_layer(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    at = make_cloud(rng.normal(size=LARGE_N), rng.normal(size=LARGE_N))
    above = make_cloud(rng.normal(size=LARGE_N + 1), rng.normal(size=LARGE_N + 1))
    assert not at.dense and at.x is not None
    assert above.dense and above.x is None and above.counts is not None
    assert int(above.counts.sum()) == LARGE_N + 1  # every point lands in a cell

    big = make_context(25_000, groups=None)
    findings = make_findings()
    planned = {p.id: p for p in plan_figures(big, findings)}
    for name in ("linearity", "variance", "influence", "independence", "partial-water"):
        data = planned[f"fig-growth-{name}"].data
        assert data.cloud.dense, name
        assert data.flag_x.size > 0, name  # flagged points still drawn one by one
    qq = planned["fig-growth-normality"].data
    assert qq.theoretical.size <= MAX_QUANTILES + qq.flag_x.size
    refs = draw_figures(big, findings, tmp_path, "f", FigureOptions(format="svg"))
    for ref in refs:
        size = (tmp_path / f"{ref.id}.svg").stat().st_size
        assert size < 400_000, (ref.id, size)
    assert "Shaded 2-D histogram (log count scale) of 25,000 residuals" in refs[0].alt


def test_binned_mean_matches_scipy_binned_statistic() -> None:
    from scipy.stats import binned_statistic

    rng = np.random.default_rng(3)
    x = rng.uniform(0, 1, 1000)
    y = np.sin(6 * x) + rng.normal(0, 0.3, 1000)
    ours = bin_means(x, y, bins=10)
    edges = np.quantile(x, np.linspace(0, 1, 11))
    # Reference: scipy.stats.binned_statistic on the same quantile edges.
    ref_mean = binned_statistic(x, y, "mean", bins=edges).statistic
    ref_sd = binned_statistic(x, y, lambda v: np.std(v, ddof=1), bins=edges).statistic
    ref_n = binned_statistic(x, y, "count", bins=edges).statistic
    np.testing.assert_allclose(ours.mean, ref_mean, rtol=1e-12)
    np.testing.assert_allclose(ours.se, ref_sd / np.sqrt(ref_n), rtol=1e-10)
    np.testing.assert_allclose(ours.high - ours.low, 4 * ref_sd / np.sqrt(ref_n), rtol=1e-10)


def test_binned_mean_gives_each_value_a_bin_when_x_is_discrete() -> None:
    x = np.repeat([0.0, 1.0], 50)
    y = np.concatenate([np.zeros(50), np.ones(50)])
    binned = bin_means(x, y)
    assert binned.centre.tolist() == [0.0, 1.0] and binned.mean.tolist() == [0.0, 1.0]


def test_envelope_matches_exact_order_statistic_quantiles(monkeypatch: pytest.MonkeyPatch) -> None:
    from scipy import stats

    ctx = make_context(60, order=None, groups=None)
    monkeypatch.setattr(normality, "ENVELOPE_DRAWS", 4000)
    data = normality.compute(ctx, make_findings()[1])
    assert data is not None
    n, df = data.n, data.df
    k = np.arange(1, n + 1)
    # Reference: the exact law of the k-th order statistic of n iid t(df) values,
    # F^-1(Beta(k, n-k+1) quantile) (David & Nagaraja 2003), via scipy.stats.
    low = stats.t.ppf(stats.beta.ppf(0.025, k, n - k + 1), df)
    high = stats.t.ppf(stats.beta.ppf(0.975, k, n - k + 1), df)
    width = high - low
    assert np.max(np.abs(data.low - low) / width) < 0.08
    assert np.max(np.abs(data.high - high) / width) < 0.08
    # Blom (1958) positions on the x axis.
    np.testing.assert_allclose(data.theoretical, stats.norm.ppf((k - 0.375) / (n + 0.25)))


def test_envelope_is_seeded(ctx: CheckContext) -> None:
    a = normality.compute(ctx, make_findings()[1])
    b = normality.compute(ctx, make_findings()[1])
    c = normality.compute(replace(ctx, seed=ctx.seed + 1), make_findings()[1])
    assert a is not None and b is not None and c is not None
    assert np.array_equal(a.low, b.low) and not np.array_equal(a.low, c.low)


def test_qq_thins_to_about_1200_quantiles_keeping_the_tails() -> None:
    ranks = normality.plotted_ranks(1_000_000)
    assert ranks.size <= MAX_QUANTILES
    assert ranks[:100].tolist() == list(range(100))
    assert ranks[-100:].tolist() == list(range(999_900, 1_000_000))
    assert normality.plotted_ranks(500).tolist() == list(range(500))


def test_expected_absolute_t_matches_scipy() -> None:
    from scipy import stats

    for df in (3.0, 10.0, 177.0, 5e5):
        # Reference: E|T| by scipy's numerical expectation over the t density.
        ref = stats.t(df).expect(abs)
        assert variance.expected_abs_t(df) == pytest.approx(ref, rel=1e-6)
    assert variance.expected_abs_t(1e9) == pytest.approx(np.sqrt(2 / np.pi))


def test_lag1_autocorrelation_matches_statsmodels_acf() -> None:
    from statsmodels.tsa.stattools import acf

    e = np.cumsum(np.random.default_rng(5).normal(size=300)) * 0.1
    e += np.random.default_rng(6).normal(size=300)
    # Reference: statsmodels' sample autocorrelation at lag 1.
    assert independence.lag1_autocorrelation(e) == pytest.approx(acf(e, nlags=1)[1], rel=1e-12)


def test_vifs_match_statsmodels_and_longley() -> None:
    from statsmodels.stats.outliers_influence import variance_inflation_factor

    frame = pd.read_csv(DATA / "vif" / "Longley.csv")
    values = json.loads((DATA / "vif" / "values.json").read_text())
    design = make_design("y ~ x1 + x2 + x3 + x4 + x5 + x6", frame)
    ours = {term: v for term, v, _ in collinearity.term_vifs(design)}
    for j, term in enumerate(["x1", "x2", "x3", "x4", "x5", "x6"], start=1):
        # Reference: statsmodels variance_inflation_factor on the design with its constant.
        ref = variance_inflation_factor(design.X, j)
        assert ours[term] == pytest.approx(ref, rel=1e-6)
    # Secondary check (published values recalled from memory, values.json says so):
    # Longley (1967) VIFs as reprinted in regression texts, to 2 decimals.
    for key, entry in values["published"].items():
        term = key.split()[0]
        assert ours[term] == pytest.approx(entry["value"], abs=0.006)


def test_generalized_vif_does_not_depend_on_the_reference_level() -> None:
    # Fox & Monette (1992): GVIF is invariant to the coding of a term's columns.
    frame = synthetic_frame(300)
    a = make_design("yield_t ~ water + ph + C(site)", frame)
    b = make_design("yield_t ~ water + ph + C(site, Treatment('c'))", frame)
    va = {t: v for t, v, _ in collinearity.term_vifs(a)}
    vb = {t: v for t, v, _ in collinearity.term_vifs(b)}
    assert va["C(site)"] == pytest.approx(vb["C(site, Treatment('c'))"], rel=1e-9)
    assert va["water"] == pytest.approx(vb["water"], rel=1e-9)
    assert all(v >= 1 - 1e-12 for v in va.values())


def test_collinearity_reads_vifs_from_the_finding(ctx: CheckContext) -> None:
    finding = Finding("collinearity", "holds", None, extra=(("vif", {"water": 2.0, "ph": 7.5}),))
    data = collinearity.compute(ctx, finding)
    assert data is not None and data.terms == ("ph", "water")
    assert data.values.tolist() == [7.5, 2.0]
    extra = (("vif", {"water": 1.5, "C(site)": 1.2}), ("df", {"water": 1, "C(site)": 3}))
    data = collinearity.compute(ctx, Finding("collinearity", "holds", None, extra=extra))
    assert data is not None and data.generalized == (False, True)
    extra = (("gvif", {"water": 1.5, "C(site)": 8.0}), ("df", {"water": 1, "C(site)": 3}))
    data = collinearity.compute(ctx, Finding("collinearity", "holds", None, extra=extra))
    assert data is not None and data.values.tolist() == pytest.approx([2.0, 1.5])


def test_nothing_to_show_gives_no_figure(tmp_path: Path) -> None:
    ctx = make_context(order=None, groups=None, formula="yield_t ~ water")
    findings = (
        Finding("independence", "not-assessed", None, reason="no order or groups declared"),
        Finding("collinearity", "not-assessed", None, reason="one predictor"),
    )
    assert draw_figures(ctx, findings, tmp_path, "f", FigureOptions()) == ()


def test_not_assessed_with_data_still_draws_and_says_why(ctx: CheckContext, tmp_path: Path) -> None:
    finding = Finding("normality", "not-assessed", None, reason="the check was switched off.")
    (ref,) = draw_figures(ctx, (finding,), tmp_path, "f", FigureOptions())
    assert ref.caption.endswith("Not assessed: the check was switched off.")


def test_independence_by_group_caps_at_sixty_groups() -> None:
    ctx = make_context(400, order=None, frame=synthetic_frame(400, groups=100))
    data = independence.compute(ctx, make_findings()[4])
    assert isinstance(data, independence.GroupMeansData)
    assert data.total_groups == ctx.frame["block"].nunique() > 90 and data.mean.size == 60
    assert np.all(np.diff(data.mean) >= 0)
    # Reference: pandas group means of the residuals.
    ref = pd.Series(ctx.fit.resid).groupby(ctx.frame["block"].to_numpy()).mean()
    assert data.mean[0] == pytest.approx(ref.min()) and data.mean[-1] == pytest.approx(ref.max())


def test_independence_view_follows_the_measure(ctx: CheckContext) -> None:
    by_order = independence.compute(ctx, make_findings()[4])
    about_groups = Finding("independence", "concern", Statistic("design effect", 2.3))
    by_group = independence.compute(ctx, about_groups)
    assert isinstance(by_order, independence.OrderData)
    assert isinstance(by_group, independence.GroupMeansData)


def test_order_may_be_dates_or_text(tmp_path: Path) -> None:
    frame = synthetic_frame(90)
    frame["visit"] = pd.Timestamp("2024-01-01") + pd.to_timedelta(frame["day"], unit="D")
    frame["wave"] = [f"w{d:03d}" for d in frame["day"]]
    dated = make_context(frame=frame, order="visit", groups=None)
    data = independence.compute(dated, make_findings()[4])
    assert isinstance(data, independence.OrderData) and data.dates and not data.positional
    assert data.cloud.x is not None and data.cloud.x.min() == pytest.approx(19723.0 + 1)  # days
    texts = all_texts(drawn("independence", dated, make_findings())[0])
    assert any(t.startswith("2024-") or "Jan" in t or "Feb" in t for t in texts)
    worded = make_context(frame=frame, order="wave", groups=None)
    data = independence.compute(worded, make_findings()[4])
    assert isinstance(data, independence.OrderData) and data.positional
    ref = draw_figures(worded, make_findings()[4:5], tmp_path, "", FigureOptions())[0]
    assert "Residuals in wave order" in ref.caption


def test_independence_order_column_missing_is_a_data_error() -> None:
    ctx = make_context(order="visit")
    with pytest.raises(DataError, match="order column 'visit'"):
        independence.compute(ctx, make_findings()[4])


def test_partial_terms_skip_factors_interactions_and_shared_columns() -> None:
    frame = synthetic_frame(120)
    design = make_design("yield_t ~ water + I(water**2) + ph + C(site) + ph:water", frame)
    assert [t for t, _ in partial.numeric_terms(design)] == []  # every numeric term shares
    design = make_design("yield_t ~ water + ph + C(site)", frame)
    assert [t for t, _ in partial.numeric_terms(design)] == ["water", "ph"]


def test_leverage_one_point_is_marked_undefined(tmp_path: Path) -> None:
    frame = pd.read_csv(DATA / "anscombe" / "anscombe.csv")
    frame["case"] = [f"c{i}" for i in range(1, 12)]
    ctx = make_context(formula="y4 ~ x4", frame=frame, id_column="case", order=None, groups=None)
    # Anscombe (1973) set IV: the 8th case (x = 19) alone fixes the slope.
    assert np.flatnonzero(ctx.influence.undefined).tolist() == [7]
    refs = draw_figures(ctx, make_findings()[3:4], tmp_path, "f", FigureOptions())
    influence_ref = refs[0]
    assert "c8" in influence_ref.caption and "leverage 1" in influence_ref.caption
    texts = all_texts(drawn("influence", ctx, make_findings())[0])
    assert "c8 (leverage 1)" in texts


def test_numbers_in_captions_read_plainly() -> None:
    from premises.figures.wording import format_number

    assert format_number(0.042) == "0.0420"
    assert format_number(1788.5134) == "1,789"
    assert format_number(10.0) == "10"
    assert format_number(-0.6149) == "-0.615"
    assert format_number(2.0e-5) == "2.00 × 10⁻⁵"
    assert format_number(float("nan")) == "undefined" and format_number(None) == "undefined"


def test_threshold_expressions() -> None:
    assert evaluate_threshold("4/n", 200, 5) == pytest.approx(0.02)
    assert evaluate_threshold("2p/n", 200, 5) == pytest.approx(0.05)
    assert evaluate_threshold("2*sqrt(p/n)", 100, 4) == pytest.approx(0.4)
    assert evaluate_threshold("2/sqrt(n)", 400, 4) == pytest.approx(0.1)
    assert evaluate_threshold(10.0, 1, 1) == 10.0
    for bad in ("__import__('os')", "n.real", "4/", "q/n"):
        with pytest.raises(SpecError, match="not arithmetic in n and p"):
            evaluate_threshold(bad, 10, 2)


def test_failed_draw_leaves_previous_file_and_no_temp(tmp_path: Path) -> None:
    target = tmp_path / "fig-x.png"
    target.write_bytes(b"previous")

    def broken(data: object, fig: object) -> None:
        raise RuntimeError("boom")

    with pytest.raises(RuntimeError):
        render_to_file(broken, None, target, FigureOptions())
    assert target.read_bytes() == b"previous"
    assert [p.name for p in tmp_path.iterdir()] == ["fig-x.png"]


def test_unknown_format_is_a_spec_error(tmp_path: Path) -> None:
    with pytest.raises(SpecError, match="png, svg, pdf"):
        render_to_file(lambda d, f: None, None, tmp_path / "x.gif", FigureOptions(format="gif"))


def test_size_follows_options(ctx: CheckContext, tmp_path: Path) -> None:
    from PIL import Image

    draw_figures(ctx, make_findings()[:1], tmp_path, "f", FigureOptions(dpi=100, width=5.0))
    with Image.open(tmp_path / "fig-growth-linearity.png") as image:
        assert image.size == (500, 360)  # 5 in x 100 dpi, height 0.72 x width
