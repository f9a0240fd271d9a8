"""Control charts: individuals chart with Western Electric rules, EWMA, figures, HTML page.

Sources of the expected values:

* Montgomery's EWMA example (Introduction to Statistical Quality Control, the CUSUM and
  EWMA chapter): lambda = 0.1, L = 2.7, target 10, sigma 1, on the chapter's 30
  observations (the first 20 drawn from N(10, 1), the last 10 from N(11, 1)).  The data
  and the values below are FROM MEMORY, not copied from the book.  I recall the data and
  the first EWMA values z_1 = 9.945, z_2 = 9.7495 with limits 10.27 / 9.73 at i = 1 and
  10.36 / 9.64 at i = 2, widening to 10.62 / 9.38; as a check on the recalled data, the
  tabular CUSUM of the same chapter (k = 0.5, h = 5) gives C+_29 = 5.28, which I also
  recall.  I do NOT recall reliably at which observation the book's EWMA chart first
  signals, so that is not asserted from memory: the test asserts the signal the formula
  gives on the recalled data (observation 29, in the shifted part), whose EWMA and limit
  are recomputed by hand in the comments.
* A hand-worked EWMA example (lambda = 0.5, L = 3, target 10, sigma 1) computed in the
  comments.
* Synthetic series built for each Western Electric rule (Western Electric Statistical
  Quality Control Handbook, 1956), each with a twin that just misses the rule.
* The false-alarm rate of rule 1 on N(0, 1) data: 2 (1 - Phi(3)) = 0.0027.
"""

import base64
import math
import re
from html.parser import HTMLParser

import numpy as np
import pytest
from matplotlib.figure import Figure

from filmmap.errors import FilmmapInputError
from filmmap.history.chart_figures import ewma_figure, history_figures, save_chart, trend_figure
from filmmap.history.control import (
    D2_PAIRS,
    baseline_limits,
    control_charts,
    ewma_chart,
    individuals_chart,
    western_electric_flags,
)
from filmmap.history.records import LotRecord, WaferSummary
from filmmap.report.history_page import history_html

# Montgomery's 30 observations, from memory (see the module notes)
MONTGOMERY = [9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34,
              9.03, 11.47, 10.51, 9.40, 10.08, 9.37, 10.62, 10.31, 8.52, 10.84,
              10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38, 11.62, 11.31, 10.52]


def test_ewma_montgomery_example_from_memory():
    ch = ewma_chart(MONTGOMERY, lam=0.1, L=2.7, target=10.0, sigma=1.0)
    # recalled values
    assert ch.statistic[0] == pytest.approx(9.945, abs=1e-9)      # 0.1*9.45 + 0.9*10
    assert ch.statistic[1] == pytest.approx(9.7495, abs=1e-9)     # 0.1*7.99 + 0.9*9.945
    assert ch.ucl[0] == pytest.approx(10.27, abs=5e-3) and ch.lcl[0] == pytest.approx(9.73, abs=5e-3)
    assert ch.ucl[1] == pytest.approx(10.36, abs=5e-3) and ch.lcl[1] == pytest.approx(9.64, abs=5e-3)
    assert ch.ucl[-1] == pytest.approx(10.62, abs=5e-3) and ch.lcl[-1] == pytest.approx(9.38, abs=5e-3)
    # i = 1 exactly: 2.7 * sqrt(0.1/1.9 * (1 - 0.9^2)) = 2.7 * sqrt(0.01) = 0.27
    assert ch.ucl[0] - 10.0 == pytest.approx(0.27, rel=1e-12)
    # first signal from the formula: by hand z_28 = 10.5731 < UCL 10.6186 and
    # z_29 = 0.1*11.31 + 0.9*10.5731 = 10.6469 > UCL_29 = 10 + 2.7*sqrt(0.1/1.9*(1-0.9^58))
    # = 10.6187; observation 29 is index 28
    assert ch.first_signal == 28
    assert ch.statistic[28] == pytest.approx(10.6468, abs=2e-4)
    assert ch.ucl[28] == pytest.approx(10.6187, abs=2e-4)
    assert ch.flags[28] == (0,) and not any(ch.flags[:28])


def test_ewma_hand_worked_example():
    # lambda = 0.5, L = 3, target 10, sigma 1, x = 12, 8, 11, 14; lambda/(2-lambda) = 1/3
    #   z1 = 0.5*12 + 0.5*10    = 11.0    half-width 3*sqrt((1 - 0.5^2)/3) = 3*0.5     = 1.5
    #   z2 = 0.5*8  + 0.5*11    = 9.5     3*sqrt((1 - 0.5^4)/3) = 3*sqrt(0.3125)       = 1.67705
    #   z3 = 0.5*11 + 0.5*9.5   = 10.25   3*sqrt((1 - 0.5^6)/3) = 3*sqrt(0.328125)     = 1.71847
    #   z4 = 0.5*14 + 0.5*10.25 = 12.125  3*sqrt((1 - 0.5^8)/3) = 3*sqrt(0.33203125)   = 1.72866
    # only z4 is beyond its limit (12.125 > 11.72866)
    ch = ewma_chart([12, 8, 11, 14], lam=0.5, L=3.0, target=10.0, sigma=1.0)
    np.testing.assert_allclose(ch.statistic, [11.0, 9.5, 10.25, 12.125], rtol=0, atol=1e-12)
    np.testing.assert_allclose(ch.ucl - 10, [1.5, 1.67705, 1.71847, 1.72866], atol=5e-6)
    np.testing.assert_allclose(10 - ch.lcl, [1.5, 1.67705, 1.71847, 1.72866], atol=5e-6)
    assert ch.flags == ((), (), (), (0,))
    # a missing value is skipped: the statistic is held and i counts observations only
    gap = ewma_chart([12, None, 8, 11, 14], lam=0.5, L=3.0, target=10.0, sigma=1.0)
    assert math.isnan(gap.statistic[1])
    np.testing.assert_allclose(gap.statistic[[0, 2, 3, 4]], ch.statistic, atol=1e-12)
    np.testing.assert_allclose(gap.ucl[[0, 2, 3, 4]], ch.ucl, atol=1e-12)


def test_individuals_hand_worked_limits():
    # x = 10, 12, 11, 13, 12: mean 11.6; moving ranges 2, 1, 2, 1 -> MR_bar = 1.5;
    # sigma = 1.5 / 1.128 = 1.329787; UCL = 11.6 + 3 * 1.329787 = 15.589362
    ch = individuals_chart([10, 12, 11, 13, 12])
    assert ch.centre == pytest.approx(11.6)
    assert ch.sigma == pytest.approx(1.5 / 1.128)
    assert ch.ucl == pytest.approx(15.589362, abs=1e-6)
    assert ch.lcl == pytest.approx(11.6 - 3 * 1.5 / 1.128)
    assert D2_PAIRS == 1.128


def test_limits_come_from_the_baseline_window_only():
    rng = np.random.default_rng(7)
    x = np.concatenate([rng.normal(100.0, 1.0, 20), rng.normal(104.0, 1.0, 10)])
    ch = individuals_chart(x, baseline=20)
    c, s = baseline_limits(x[:20])
    assert (ch.centre, ch.sigma) == (c, s)
    assert ch.baseline.sum() == 20 and ch.baseline[:20].all()
    assert ch.first_signal is not None and ch.first_signal >= 20   # the shift is caught
    assert not ch.out_of_control[:20].any()
    with pytest.raises(FilmmapInputError, match="at least 2"):
        baseline_limits([1.0, np.nan, 3.0], baseline=2)
    with pytest.raises(FilmmapInputError, match="all equal"):
        baseline_limits([5.0, 5.0, 5.0])


def test_moving_range_sigma_is_unbiased_on_normal_data():
    rng = np.random.default_rng(11)
    _, s = baseline_limits(rng.normal(5.0, 2.0, 20000))
    assert s == pytest.approx(2.0, rel=0.02)   # E|x1 - x2| = 2 sigma / sqrt(pi) = d2 sigma


# --------------------------------------------------------------------------- run rules

def _rules_at(z):
    """Individuals chart with known centre 0 and sigma 1: values are z scores."""
    return individuals_chart(z, centre=0.0, sigma=1.0)


@pytest.mark.parametrize("rule, fires, misses, where", [
    # rule 1: one point beyond 3 sigma; the twin stops at 2.99
    (1, [0.0, 0.5, -0.5, -3.2, 0.0], [0.0, 0.5, -0.5, -2.99, 0.0], 3),
    # rule 2: two of three beyond 2 sigma, same side; the twin has its second point
    # one place too late (only one in any three) and a point exactly on 2 (not beyond)
    (2, [0.0, 2.5, 0.3, 2.2, 0.0], [0.0, 2.5, 0.3, 0.4, 2.2, 2.0], 3),
    # rule 3: four of five beyond 1 sigma, same side; the twin has only three in any five
    (3, [0.0, 1.5, 1.2, 0.5, 1.1, 1.3], [0.0, 1.5, 1.2, 0.5, 1.1, 0.9, 1.3], 5),
    # rule 4: eight in a row above the centre; the twin's eighth is below it
    (4, [-0.3] + [0.5] * 8, [-0.3] + [0.5] * 7 + [-0.1], 8),
])
def test_each_rule_fires_on_its_pattern_and_not_on_a_near_miss(rule, fires, misses, where):
    hit = _rules_at(fires)
    assert hit.flagged_by(rule) == [where]
    assert hit.first_signal == where
    assert all(set(f) <= {rule} for f in hit.flags), hit.flags   # no other rule interferes
    assert _rules_at(misses).flagged_by(rule) == []
    assert _rules_at(-np.asarray(fires)).flagged_by(rule) == [where]   # mirror image


def test_rule_2_needs_the_same_side_and_skips_missing_points():
    assert _rules_at([0.0, 2.5, -2.5, 0.0]).flagged_by(2) == []
    assert _rules_at([0.0, 2.5, np.nan, 2.2]).flagged_by(2) == [3]
    assert _rules_at([0.0, 2.5, np.nan, 2.2]).flags[2] == ()
    assert western_electric_flags([0, 0, 3.5], rules=(2, 3)) == ((), (), ())
    with pytest.raises(FilmmapInputError, match="unknown run rule"):
        western_electric_flags([0.0], rules=(5,))


def test_rule_4_flags_every_point_extending_the_run_and_a_zero_breaks_it():
    assert _rules_at([0.2] * 10).flagged_by(4) == [7, 8, 9]
    assert _rules_at([0.2] * 4 + [0.0] + [0.2] * 7).flagged_by(4) == []


def test_rule_1_false_alarm_rate_on_normal_data():
    rng = np.random.default_rng(20261201)
    n = 400_000
    ch = individuals_chart(rng.standard_normal(n), centre=0.0, sigma=1.0, rules=(1,))
    rate = len(ch.flagged_by(1)) / n
    expected = math.erfc(3 / math.sqrt(2))            # 2 (1 - Phi(3)) = 0.0026998
    assert expected == pytest.approx(0.0027, abs=1e-5)
    assert abs(rate - expected) < 4.5 * math.sqrt(expected / n)   # ~0.036 percentage points


# --------------------------------------------------------------------------- figures, HTML

def _rows(n=24, shift_at=18):
    rng = np.random.default_rng(3)
    rows = []
    for i in range(n):
        mean = 600.0 + rng.normal(0, 0.8) + (4.0 if i >= shift_at else 0.0)
        rows.append(LotRecord(
            lot_id=f"<L{i:02d}> & co" if i == 5 else f"L{i:02d}", furnace="tube \"2\" <b>",
            run_date=f"2026-01-{i + 1:02d}", lot_mean_nm=mean, wtw_pct=0.5 + rng.normal(0, 0.05),
            wiw_mean_pct=0.2 + rng.normal(0, 0.01), target_nm=600.0, tolerance_pct=2.0,
            wafers=(WaferSummary("W1", 4),)))
    return rows


def test_control_charts_and_figures(tmp_path):
    rows = _rows()
    charts = control_charts(rows, baseline=15, lam=0.2, L=3.0)
    assert set(charts) == {"lot_mean_nm", "wtw_pct", "wiw_mean_pct"}
    ind, ew = charts["lot_mean_nm"]
    assert ind.first_signal is not None and ind.first_signal >= 18
    assert ew.first_signal is not None and ew.first_signal >= 18
    figs = history_figures(rows, charts, dpi=60)
    assert len(figs) == 6 and all(isinstance(f, Figure) for f in figs.values())
    f = trend_figure(ind, [r.lot_id for r in rows], title="$not math$", ylabel="nm", dpi=60)
    path = save_chart(f, tmp_path / "trend.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    save_chart(ewma_figure(ew, dpi=60), tmp_path / "ewma.png")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ewma.png", "trend.png"]  # no temp left
    # only greys and viridis colours on the lines of the figures
    import matplotlib
    from matplotlib.colors import to_rgba
    allowed = [to_rgba(matplotlib.colormaps["viridis"](v)) for v in np.linspace(0, 1, 256)]
    g = ewma_figure(ew, dpi=60)
    for ax in f.axes + g.axes:
        for line in ax.get_lines():
            for c in (line.get_color(), line.get_markerfacecolor(), line.get_markeredgecolor()):
                r, g, b, _ = to_rgba(c)
                grey = abs(r - g) < 1e-6 and abs(g - b) < 1e-6
                assert grey or min(np.abs(np.array(a[:3]) - (r, g, b)).max()
                                   for a in allowed) < 0.01


class _Tags(HTMLParser):
    VOID = {"meta", "img", "br", "hr", "link", "input"}

    def __init__(self):
        super().__init__()
        self.stack, self.srcs, self.bad = [], [], []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag in ("script", "link", "iframe", "object"):
            self.bad.append(tag)
        if "src" in a:
            self.srcs.append(a["src"])
        if "href" in a and not a["href"].startswith("#"):
            self.bad.append(a["href"])
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        assert self.stack and self.stack[-1] == tag, (tag, self.stack[-3:])
        self.stack.pop()


def test_history_html_is_self_contained_and_escaped():
    rows = _rows()
    charts = control_charts(rows, baseline=15)
    figs = history_figures(rows, charts, dpi=50)
    page = history_html(rows, figs, title="History <of> tube & co", signals=charts)
    parser = _Tags()
    parser.feed(page)
    assert parser.stack == [] and parser.bad == []
    assert len(parser.srcs) == len(figs)
    for src in parser.srcs:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:4] == b"\x89PNG"
    assert "<L05>" not in page and "&lt;L05&gt; &amp; co" in page
    assert "<b>" not in page and "tube &quot;2&quot; &lt;b&gt;" in page
    assert "History &lt;of&gt; tube &amp; co" in page
    assert not re.search(r"(https?:|//)[^ ]*\.", page.replace("data:image/png;base64,", ""))
    assert "rule 1" in page or "rule 2" in page or "beyond the EWMA limits" in page
    with pytest.raises(FilmmapInputError):
        history_html(rows, {"x": "not an image"})


def test_chart_files_are_named_by_what_they_show():
    from filmmap.report.history_page import chart_filename

    figs = history_figures(_rows(), dpi=40)
    names = [chart_filename(c) for c in figs]
    assert len(set(names)) == len(names) == 6
    assert "lot_mean_thickness_individuals.png" in names
    assert "wafer_to_wafer_non_uniformity_ewma.png" in names
    assert not any(n.startswith("chart_") for n in names)


def test_limits_from_few_lots_are_called_provisional_and_spreads_stay_non_negative():
    # Montgomery (section 5.3, from memory): 20-25 subgroups for trial limits; a spread's
    # lower limit below zero means nothing, so it is drawn at zero
    from filmmap.history.control import MIN_BASELINE_LOTS, baseline_warnings

    import dataclasses

    # WTW alternating 0.05 / 0.5 %: centre 0.275 %, sigma = mean moving range / 1.128 =
    # 0.40 %, so centre - 3 sigma is about -0.92 %: below zero
    rows = [dataclasses.replace(r, wtw_pct=(0.05, 0.5)[i % 2])
            for i, r in enumerate(_rows(n=4, shift_at=99))]
    charts = control_charts(rows, baseline=3)
    warns = baseline_warnings(charts)
    assert len(warns) == 3 and all("from only 3 lot(s)" in w for w in warns)
    assert MIN_BASELINE_LOTS == 20
    ind = charts["wtw_pct"][0]
    figs = history_figures(rows, charts, dpi=40)
    fig = figs["Wafer-to-wafer non-uniformity (WTW): individuals chart"]
    texts = [t.get_text() for t in fig.axes[0].texts]
    assert "limits from 3 lot(s): provisional" in texts
    assert ind.lcl < -0.5                                    # the computed limit stays as is
    dashed = [line.get_ydata()[0] for line in fig.axes[0].get_lines()
              if line.get_linestyle() == "--"]
    assert min(dashed) == 0.0                                # drawn at zero
    assert not baseline_warnings(control_charts(_rows(n=24), baseline=20))


def test_ewma_centre_is_labelled_as_the_baseline_mean():
    _, ew = control_charts(_rows(), baseline=15)["lot_mean_nm"]
    labels = [line.get_label() for line in ewma_figure(ew, dpi=40).axes[0].get_lines()]
    assert "centre (baseline mean)" in labels and "target" not in labels


def test_next_run_in_words_with_units():
    from filmmap.report.history_page import next_run_lines

    nxt = {"adjust_step": "wet", "minutes_now": 115.0, "minutes_next": 116.50548055609704,
           "zone_trims_C": {"load": 1.5914918558218443, "center": 1.16e-14, "source": -0.70},
           "predicted_mean_nm": 600.0000000000002, "predicted_wtw_pct": 0.6210162659088198,
           "time_clipped": 1, "clipped_zones": [], "warnings": ["few lots"], "caution": "c"}
    text = "\n".join(next_run_lines(nxt))
    assert "wet step: 115.0 min now -> 116.5 min next (at its upper bound)" in text
    assert "absolute, relative to the untrimmed set points" in text
    assert "load +1.6 K, center +0.0 K, source -0.7 K" in text
    assert "predicted lot mean 600.0 nm, predicted WTW NU 0.62 %" in text
    assert "e-14" not in text and "0000000" not in text
    page = history_html(_rows(n=3), {}, next_run=nxt)
    assert "Run-to-run estimate for the next run" in page and "116.5 min next" in page
