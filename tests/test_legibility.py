"""The report read at 1280 px: figure text large enough, labels whole, the effects table
in a shape that fits the page."""

from __future__ import annotations

from types import SimpleNamespace

import matplotlib.text
import numpy as np
import pytest

from contenders.statistics.compare import ComparisonRow, Method
from contenders.statistics.effects import EffectMix, EffectRow
from contenders.output.report import _effects_table
from contenders.output import figures
from contenders.output.readings import describe

PSIS = Method("psis", k_threshold=0.7)   # plain PSIS-LOO, no refit

LONG = "Lognormal with guesses and lapses"


@pytest.fixture
def drawn(monkeypatch):
    """The matplotlib figure each drawing function hands to ``render``."""
    seen = []
    real = figures.render

    def keep(fig, alt, prefer="svg"):
        seen.append(fig)
        return real(fig, alt, prefer)

    monkeypatch.setattr(figures, "render", keep)
    return seen


def _texts(fig) -> list[matplotlib.text.Text]:
    return [t for t in fig.findobj(matplotlib.text.Text) if t.get_visible() and t.get_text().strip()]


def _assert_legible(fig, smallest: float = 7.0) -> None:
    # 7 pt shown at up to 1.3 x its drawn size is about 10 px or more on a 1280 px
    # screen: our own floor for this report (common practice, no source)
    small = [(t.get_text(), t.get_fontsize()) for t in _texts(fig) if t.get_fontsize() < smallest]
    assert not small, small
    cut = [t.get_text() for t in _texts(fig) if "…" in t.get_text()]
    assert not cut, cut


def test_density_grid_names_the_outcome_and_keeps_long_labels_whole(drawn):
    rng = np.random.default_rng(3)
    y = rng.lognormal(5.6, 0.2, 120)
    cands = [(LONG, rng.lognormal(5.6, 0.2, (20, 120))), ("Inverse Gaussian (Wald)", rng.lognormal(5.6, 0.2, (20, 120)))]
    assert figures.replicate_density_grid(y, cands, outcome="Reaction") is not None
    (fig,) = drawn
    _assert_legible(fig)
    assert fig._supxlabel.get_text() == "Reaction"
    titles = {ax.get_title(loc="left") for ax in fig.axes}
    assert LONG in titles and "Inverse Gaussian (Wald)" in titles


def test_elpd_figure_shows_the_shared_rank_and_whole_labels(drawn):
    nan = float("nan")
    rows = [ComparisonRow(rank, label.lower(), label, nan, nan, nan, d, dse, nan, nan, nan, 0, 0, PSIS, nan,
                          shared_rank=shared, standing="best" if rank == 1 else "tied")
            for rank, shared, label, d, dse in ((1, "1", LONG, 0.0, 0.0), (2, "2–3", "Gamma", 1.3, 2.9),
                                                (3, "2–3", "Inverse Gaussian (Wald)", 1.6, 2.5))]
    assert figures.elpd_differences(rows) is not None
    (fig,) = drawn
    _assert_legible(fig)
    labels = [t.get_text().replace("\n", " ") for t in fig.axes[0].get_yticklabels()]
    assert labels == [f"1. {LONG}", "2–3. Gamma", "2–3. Inverse Gaussian (Wald)"]


def test_svg_may_be_shown_larger_than_drawn():
    fig = figures._new(4.0, 2.0)
    fig.add_subplot().plot([0, 1], [0, 1])
    svg = figures._svg(fig, "a line")
    # 4 in = 288 pt, shown at up to 1.3 times that
    assert 'style="max-width:374pt"' in svg


def _effect(key, title, observed, rows, reading="agree"):
    return SimpleNamespace(key=key, title=title, kind="difference", column="density", level="sparse",
                           reference="dense", observed=observed, rows=rows, reading=reading,
                           combined=EffectMix(observed, observed - 1, observed + 1, 10))


def _row(cid, label, weight, mean, inside=True):
    return EffectRow(cid, label, "ok" if weight is not None else "unhealthy", 1, weight, mean, mean - 2, mean + 2,
                     "above", inside, 10, 0)


def test_effects_table_has_candidates_as_rows_and_effects_as_columns():
    rows = [_row(f"c{i}", f"Candidate {i}", 0.1 if i < 8 else None, 10.0 + i, inside=i != 3) for i in range(10)]
    effects = [_effect("mean", "difference in mean", 12.0, rows), _effect("median", "difference in median", 11.0, rows)]
    t = _effects_table(SimpleNamespace(design=SimpleNamespace(outcome="rt")), effects)
    # ten candidates give ten rows, not ten columns: 2 + one column per effect
    assert t.headers == ["Candidate", "Stacking weight", "difference in mean (rt)", "difference in median (rt)"]
    assert [r[0].text for r in t.rows] == (["Observed in the data"] + [f"Candidate {i}" for i in range(10)]
                                          + ["Stacking-weighted mix", "Do the weighted candidates agree?"])
    assert t.rows[0][2].text == "12.0" and t.rows[4][2].text == "◇ 13.0 (11.0 to 15.0)"
    assert t.rows[9][1].text == "not ranked" and t.row_cls[9] == "muted"
    assert len(t.csv_rows) == 2 * (10 + 1)   # the CSV keeps one row per effect and candidate (and the mix)


# --- the predictive-check figures at 1280 px ------------------------------------------

def _fits_1280(fig) -> None:
    # drawn width in inches -> CSS px (96 per inch) at the largest display scale; the
    # page's text column is narrower than a 1280 px screen (common practice, no source)
    assert fig.get_figwidth() * 96 * figures.DISPLAY_SCALE <= 1100


def _checks_of(rng, n=200, shift=0.0, spread=1.0):
    from scipy import stats as sps

    from contenders.statistics.checks import predictive_checks

    y = rng.lognormal(6.0, 0.35, n)
    y_rep = rng.lognormal(6.0 + shift, 0.35 * spread, (200, n))
    log_lik = np.broadcast_to(sps.lognorm(0.35 * spread, scale=np.exp(6.0 + shift)).logpdf(y), (200, n)).copy()
    log_lik += rng.normal(0, 0.01, log_lik.shape)
    return y, y_rep, predictive_checks(y, y_rep, log_lik, thresholds=(450.0,))


def test_statistic_figure_is_one_panel_per_statistic_with_rows_of_candidates(drawn):
    rng = np.random.default_rng(4)
    y, _, good = _checks_of(rng)
    _, _, narrow = _checks_of(rng, spread=0.5)
    assert figures.statistic_grid([(LONG, good), ("Inverse Gaussian (Wald)", narrow)], 0.01) is not None
    (fig,) = drawn
    _assert_legible(fig)
    _fits_1280(fig)
    panels = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title(loc="left") for ax in panels] == [
        describe(r.statistic)
        for r in good.rows]
    labels = [t.get_text() for t in panels[0].get_yticklabels()]
    assert labels == ["Lognormal with\nguesses and lapses", "Inverse Gaussian\n(Wald)"]   # whole, in two lines
    notes = [t.get_text() for t in panels[1].texts]   # the SD: the narrow candidate misses it
    assert any(t.startswith("◆ p ") for t in notes) and any(t.startswith("p ") for t in notes)
    # the observed value is a thick ink line at the observed statistic
    sd_obs = next(r.observed for r in good.rows if r.statistic == "sd")
    thick = [ln for ln in panels[1].lines if ln.get_linewidth() >= 2.0]
    assert thick and thick[0].get_xdata()[0] == pytest.approx(sd_obs)


def test_loo_pit_figure_draws_the_band_and_names_a_departure(drawn):
    rng = np.random.default_rng(5)
    _, _, good = _checks_of(rng, n=300)
    _, _, narrow = _checks_of(rng, n=300, spread=0.6)
    assert good.loo_pit_test["inside"] and not narrow.loo_pit_test["inside"]
    assert figures.loo_pit_grid([(LONG, good), ("Inverse Gaussian (Wald)", narrow)]) is not None
    (fig,) = drawn
    _assert_legible(fig)
    _fits_1280(fig)
    titles = [ax.get_title(loc="left") for ax in fig.axes if ax.get_visible()]
    assert titles == [f"{LONG}\ninside the 99 % band", "◆ Inverse Gaussian (Wald)\nleaves the 99 % band"]
    # the band's limits are the ones the test used
    from contenders.statistics.checks import band_limits

    z, lower, _ = band_limits(300, 0.99)
    limit = fig.axes[0].lines[0]
    assert np.allclose(limit.get_xdata(), z) and np.allclose(limit.get_ydata(), lower - z)


def test_quantile_figure_marks_the_levels_a_candidate_misses(drawn):
    rng = np.random.default_rng(6)
    _, _, good = _checks_of(rng)
    _, _, shifted = _checks_of(rng, shift=0.3)
    assert figures.quantile_grid([(LONG, good), ("Inverse Gaussian (Wald)", shifted)], outcome="Reaction") is not None
    (fig,) = drawn
    _assert_legible(fig)
    _fits_1280(fig)
    axes = [ax for ax in fig.axes if ax.get_visible()]
    assert axes[1].get_title(loc="left").splitlines() == [
        "Inverse Gaussian (Wald)", "outside: 5–95 % high"]
    assert axes[0].get_title(loc="left").splitlines()[0] == LONG
    diamonds = [ln for ln in axes[1].lines if ln.get_marker() == "D"]
    assert len(diamonds) == 19


def test_prior_figure_follows_the_same_grammar(drawn):
    rng = np.random.default_rng(7)
    _, _, c = _checks_of(rng)
    prior = SimpleNamespace(stat_draws={k: v * rng.lognormal(0, 1, v.shape) for k, v in c.stat_draws.items()},
                            bounds={"mean": (150.0, 5000.0)}, inside_each={"mean": 0.83})
    stats = list(c.stat_draws)
    observed = {r.statistic: r.observed for r in c.rows}
    assert figures.prior_grid([(LONG, prior), ("Gamma", prior)], stats, observed) is not None
    (fig,) = drawn
    _assert_legible(fig)
    _fits_1280(fig)
    mean_panel = fig.axes[stats.index("mean")]
    assert [t.get_text() for t in mean_panel.texts if "in" in t.get_text()] == ["83 % in", "83 % in"]
    bounds = [ln.get_xdata()[0] for ln in mean_panel.lines if ln.get_linestyle() == "--"]
    assert sorted(bounds) == [150.0, 5000.0]


def test_pareto_k_bands_are_labelled_from_the_run_threshold():
    # edges 0.5 and min(1 - 1/log10 S, 0.7) (Vehtari et al. 2024, "Pareto smoothed
    # importance sampling", JMLR 25(72)); S = 1000 gives 1 - 1/3 = 0.6667
    from contenders.output.out_of_sample import k_bands
    from contenders.statistics.compare import k_band_counts
    t = 1 - 1 / np.log10(1000)
    assert [b[0] for b in k_bands(t)] == ["k ≤ 0.5", "0.5 < k ≤ 0.6667", "k > 0.6667"]
    assert [b[0] for b in k_bands(0.7)] == ["k ≤ 0.5", "0.5 < k ≤ 0.7", "k > 0.7"]
    assert [b[0] for b in k_bands(0.45)] == ["k ≤ 0.45", "k > 0.45"]
    assert k_band_counts(np.array([0.1, 0.5, 0.55, 0.6667, 0.68, np.nan]), t) == [2, 1, 2]   # 0.6667 > 2/3
    # an infinite k (a failed tail fit, seen on survival's capacitor data) is the worst
    # there is: top band and first in the list; a missing one (K-fold) in neither
    from contenders.statistics.compare import worst_k
    assert k_band_counts(np.array([0.1, np.inf, np.nan]), 0.7) == [1, 0, 1]
    assert worst_k(np.array([0.2, np.nan, np.inf, 0.9]), 5) == [2, 3, 0]


def test_sensitivity_reading_codes():
    from contenders.output.readings import SENSITIVITY_READINGS as READINGS
    from contenders.statistics.sensitivity import READING_CODES, _reading
    assert _reading(0.2, 0.3, 0.05) == "pulled_both_ways"
    assert _reading(0.2, 0.01, 0.05) == "set_by_prior"
    assert _reading(0.01, 0.3, 0.05) == "led_by_data"
    assert _reading(0.01, 0.01, 0.05) == "steady"
    assert _reading(float("nan"), 0.3, 0.05) == ""
    assert all(READINGS[k] for k in READINGS) and set(READINGS) == set(READING_CODES)


def test_worst_k_figure_draws_an_infinite_k_at_the_edge(drawn):
    # ArviZ reports k = inf when the tail fit fails (seen on survival's capacitor data,
    # 64 rows, half censored); the figure drew nothing and the report stopped with
    # "Axis limits cannot be NaN or Inf"
    ok = SimpleNamespace(pareto_k=np.array([0.1, 0.3, 0.8, 0.2]), k_threshold=0.7, refitted=[2])
    bad = SimpleNamespace(pareto_k=np.array([np.inf, 0.4, np.nan, 0.9]), k_threshold=0.7, refitted=[])
    assert figures.pareto_k_worst([(LONG, ok, [2, 3, 4, 5]), ("Normal", bad, [2, 3, 4, 5])]) is not None
    fig = drawn[-1]
    ax = fig.axes[1]
    lo, hi = ax.get_xlim()
    assert np.isfinite([lo, hi]).all() and hi >= 1.0
    labels = [t.get_text() for t in ax.get_yticklabels()]
    assert "row 2 (k = ∞)" in labels and len(labels) == 3   # the NaN row (row 4) is left out
    widths = sorted(p.get_width() for p in ax.patches)
    assert widths[-1] == pytest.approx(hi - 0.02)
    _assert_legible(fig)
