"""Chart pictures: what the PNG and HTML files show is exactly what the replay or the store holds."""

from __future__ import annotations

import argparse
import asyncio
import base64
import csv
import importlib.util
import io
import json
import re
import subprocess
import sys
import textwrap
from collections import Counter
from dataclasses import fields, replace
from pathlib import Path

import numpy as np
import pytest
from matplotlib.colors import to_hex
from PIL import Image
from scipy import integrate, stats

from monitor.config import load_config
from monitor.replay import replay
from monitor.report import (
    OKABE_ITO,
    RULE_STYLES,
    WIDTH_PX,
    ChartPicture,
    DistributionLaws,
    ReportError,
    add_report_command,
    baseline_readings_from_data,
    draw_figure,
    figure_size_px,
    fitted_distribution,
    html_page,
    main,
    pictures_from_replay,
    pictures_from_store,
    render_html,
    render_png,
    summarize,
    with_fitted_distribution,
)
from monitor.spc import ChartKind, RuleId, Statistic
from monitor.spc.parents import Parent
from monitor.store import CommitBatch, LimitsRow, SignalRow, Store, SubgroupRow

ROOT = Path(__file__).resolve().parents[1]
DEMO_CONFIG = ROOT / "config" / "demo.yaml"
CAUTION = "statistical evidence for people, not a safety system"
CHART = "press-9/thickness"


# ---------------------------------------------------------------- helpers


def _stamp(i: int) -> str:
    return f"2026-03-02T06:{i // 60:02d}:{i % 60:02d}.000Z"


def point_line(
    i: int,
    kind: str,
    statistic: str,
    value: float,
    *,
    n: int = 5,
    center: float = 8.0,
    half_width: float | None = 0.054,
    lower: float | None = None,
) -> dict[str, object]:
    upper = None if half_width is None else center + half_width
    if lower is None and half_width is not None:
        lower = center - half_width
    return {
        "type": "point",
        "chart": CHART,
        "kind": kind,
        "statistic": statistic,
        "subgroup": i,
        "n": n,
        "start": _stamp(i),
        "end": _stamp(i),
        "value": value,
        "center": center,
        "lower": lower,
        "upper": upper,
    }


def signal_line(
    i: int, kind: str, statistic: str, rule: str, value: float, side: str = "upper"
) -> dict[str, object]:
    return {
        "type": "signal",
        "chart": CHART,
        "kind": kind,
        "statistic": statistic,
        "rule": rule,
        "side": side,
        "subgroup": i,
        "subgroups": [i],
        "start": _stamp(i),
        "end": _stamp(i),
        "value": value,
        "center": 8.0,
        "lower": 7.946,
        "upper": 8.054,
        "z": None,
        "run_start": None,
    }


def xbar_r_lines(count: int = 40, *, sizes: list[int] | None = None) -> list[dict[str, object]]:
    """Means and ranges of ``count`` subgroups (n may vary), with signals of three rules."""
    rng = np.random.default_rng(11)
    lines: list[dict[str, object]] = []
    for i in range(count):
        n = 5 if sizes is None else sizes[i % len(sizes)]
        half = 3 * 0.04 / np.sqrt(n)
        mean = 8.0 + float(rng.normal(0, 0.04 / np.sqrt(n)))
        lines.append(point_line(i, "xbar_r", "mean", mean, n=n, half_width=half))
        lines.append(
            point_line(
                i,
                "xbar_r",
                "range",
                float(rng.uniform(0.02, 0.15)),
                n=n,
                center=0.093,
                half_width=0.104,
                lower=0.0,
            )
        )
    lines += [
        signal_line(7, "xbar_r", "mean", "beyond_limits", 8.07),
        signal_line(22, "xbar_r", "mean", "beyond_limits", 7.93, side="lower"),
        signal_line(23, "xbar_r", "mean", "same_side_run", 7.98, side="lower"),
        signal_line(24, "xbar_r", "mean", "same_side_run", 7.98, side="lower"),
        signal_line(25, "xbar_r", "mean", "same_side_run", 7.98, side="lower"),
        signal_line(30, "xbar_r", "mean", "outer_zone_cluster", 8.04),
        signal_line(31, "xbar_r", "range", "beyond_limits", 0.21),
    ]
    return lines


def one_picture(lines: list[dict[str, object]]) -> ChartPicture:
    return pictures_from_replay(lines)[CHART]


def artists(figure, gid: str):
    """Every line or collection of the figure with exactly this gid."""
    found = []
    for ax in figure.axes:
        found += [a for a in (*ax.lines, *ax.collections, *ax.patches, *ax.texts) if a.get_gid() == gid]
    return found


def the_line(figure, gid: str):
    lines = [a for a in artists(figure, gid) if hasattr(a, "get_xdata")]
    assert len(lines) == 1, f"expected one line {gid!r}, found {len(lines)}"
    return lines[0]


def figure_texts(figure) -> str:
    texts = [t.get_text() for t in figure.texts]
    for ax in figure.axes:
        texts += [t.get_text() for t in ax.texts] + [
            ax.get_title(loc="left"),
            ax.get_ylabel(),
            ax.get_xlabel(),
        ]
        legend = ax.get_legend()
        if legend is not None:
            texts += [t.get_text() for t in legend.get_texts()]
    return "\n".join(texts)


def gamma_laws(n: int = 4, readings: int = 120) -> DistributionLaws:
    shape, scale = 6.0, 7.0
    rng = np.random.default_rng(5)
    mean, sd = shape * scale, np.sqrt(shape) * scale
    return DistributionLaws.from_callables(
        "gamma, shape 6",
        parent_pdf=lambda x: stats.gamma.pdf(x, shape, scale=scale),
        # The mean of n gamma readings is gamma with n times the shape and 1/n the scale.
        mean_pdf=lambda x: stats.gamma.pdf(x, n * shape, scale=scale / n),
        normal_pdf=lambda x: stats.norm.pdf(x, mean, sd / np.sqrt(n)),
        parent_range=(0.0, 120.0),
        mean_range=(10.0, 80.0),
        subgroup_size=n,
        readings=rng.gamma(shape, scale, size=readings),
    )


def load_simulator():
    spec = importlib.util.spec_from_file_location("plant_simulator", ROOT / "scripts" / "plant_simulator.py")
    assert spec is not None
    assert spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault(spec.name, module)  # its dataclasses look their module up by name
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def demo_replay(tmp_path_factory) -> Path:
    """Sixty minutes of the invented tile plant, replayed with the demo configuration."""
    folder = tmp_path_factory.mktemp("demo")
    data = folder / "readings.csv"
    load_simulator().write_csv(data, minutes=60, seed=7)
    out = folder / "signals.jsonl"
    with out.open("wb") as handle:
        replay(load_config(DEMO_CONFIG), data, handle)
    return out


def read_lines(path: Path) -> list[dict[str, object]]:
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


# ---------------------------------------------------------------- the data model


def test_replay_lines_become_one_series_per_kind_and_statistic():
    """Point and signal lines are grouped per chart kind and statistic, in subgroup order, with times and n."""
    lines = xbar_r_lines(12)
    picture = one_picture(list(reversed(lines)))
    assert list(picture.series) == [(ChartKind.XBAR_R, Statistic.MEAN), (ChartKind.XBAR_R, Statistic.RANGE)]
    means = picture.series[ChartKind.XBAR_R, Statistic.MEAN]
    assert [p.subgroup for p in means.points] == list(range(12))
    assert means.points[3].time == pytest.approx(1772431383.0)  # 2026-03-02T06:03:03Z
    assert {p.n for p in means.points} == {5}
    assert [(s.subgroup, s.rule, s.side) for s in means.signals][:2] == [
        (7, "beyond_limits", "upper"),
        (22, "beyond_limits", "lower"),
    ]


def test_a_replay_line_without_a_value_is_refused_with_its_line_number():
    """A point line lacking its value is reported as 'line N: field 'value' ...', not drawn as nothing."""
    lines = xbar_r_lines(3)
    del lines[4]["value"]
    with pytest.raises(ReportError, match=r"line 5: field 'value' is missing"):
        pictures_from_replay(lines)


def test_the_baseline_line_and_the_configuration_fill_in_the_words():
    """A baseline line becomes the picture's baseline; the configuration gives title, unit and limit width."""
    config = load_config(DEMO_CONFIG)
    baseline = {
        "type": "baseline",
        "chart": "press-2/thickness",
        "mean": 7.998,
        "sigma": 0.0395,
        "estimator": "range",
        "subgroups": 25,
        "used": 24,
        "rounds": 2,
        "settled": True,
        "excluded": [
            {"subgroup": 11, "statistic": "mean", "value": 8.1, "lower": 7.9, "upper": 8.05, "round": 1}
        ],
    }
    picture = pictures_from_replay([baseline], config=config)["press-2/thickness"]
    assert picture.title == "Tile thickness on press 2"
    assert picture.unit == "mm"
    assert picture.baseline is not None
    assert (picture.baseline.subgroups, picture.baseline.used, picture.baseline.excluded) == (25, 24, (11,))
    assert picture.baseline.sigma == pytest.approx(0.0395)


# ---------------------------------------------------------------- what the figure holds


def test_every_point_of_the_input_is_plotted_with_its_value():
    """The points line of each statistic holds exactly the subgroups and values of the input."""
    lines = xbar_r_lines(40)
    figure = draw_figure(one_picture(lines))
    for statistic in ("mean", "range"):
        expected = [line for line in lines if line["type"] == "point" and line["statistic"] == statistic]
        drawn = the_line(figure, f"points|xbar_r|{statistic}")
        assert list(drawn.get_xdata()) == [line["subgroup"] for line in expected]
        assert list(drawn.get_ydata()) == pytest.approx([line["value"] for line in expected])


def test_every_signal_has_one_marker_in_the_lane_of_its_rule():
    """Per statistic and rule, the lane holds one marker per signal of the input, at its subgroup."""
    lines = xbar_r_lines(40)
    figure = draw_figure(one_picture(lines))
    expected = Counter((line["statistic"], line["rule"]) for line in lines if line["type"] == "signal")
    assert len(expected) == 4
    for (statistic, rule), count in expected.items():
        lane = the_line(figure, f"signals|xbar_r|{statistic}|{rule}")
        subgroups = sorted(
            line["subgroup"]
            for line in lines
            if line["type"] == "signal" and line["statistic"] == statistic and line["rule"] == rule
        )
        assert len(lane.get_xdata()) == count
        assert sorted(lane.get_xdata()) == subgroups
    for rule in ("beyond_limits", "same_side_run", "outer_zone_cluster"):
        assert RULE_STYLES[rule].words in figure_texts(figure)
    assert artists(figure, "signals|xbar_r|mean|middle_zone_cluster") == []


def test_points_beyond_a_limit_are_also_marked_on_the_chart():
    """Each beyond-limits signal puts a marker on the plotted point itself, at the point's value."""
    lines = xbar_r_lines(40)
    figure = draw_figure(one_picture(lines))
    flagged = the_line(figure, "flagged|xbar_r|mean|beyond_limits")
    values = {
        line["subgroup"]: line["value"]
        for line in lines
        if line["type"] == "point" and line["statistic"] == "mean"
    }
    assert list(flagged.get_xdata()) == [7, 22]
    assert list(flagged.get_ydata()) == pytest.approx([values[7], values[22]])


def test_limits_are_drawn_as_steps_when_the_subgroup_size_varies():
    """With subgroups of 3 to 6 the limits follow every point as steps; with a fixed size they are one flat line."""
    varying = draw_figure(one_picture(xbar_r_lines(30, sizes=[3, 5, 6, 4])))
    fixed = draw_figure(one_picture(xbar_r_lines(30)))
    for side in ("upper", "lower"):
        stepped = the_line(varying, f"limit-{side}|xbar_r|mean")
        assert stepped.get_drawstyle() == "steps-mid"
        assert len(stepped.get_xdata()) == 30
        assert len(set(np.round(stepped.get_ydata(), 9))) == 4
        flat = the_line(fixed, f"limit-{side}|xbar_r|mean")
        assert flat.get_drawstyle() == "default"
        assert len(set(flat.get_ydata())) == 1
    assert "n = 3 to 6" in figure_texts(varying)


def test_zones_are_shaded_at_one_and_two_sigma_on_the_location_panel_only():
    """The shaded bands of the means run from 1 to 2 sigma and from 2 sigma to the limit; the ranges have none."""
    figure = draw_figure(one_picture(xbar_r_lines(20)))
    sigma = 0.04 / np.sqrt(5)
    for name, (inner, outer) in {"zone-1-2": (1, 2), "zone-2-limit": (2, 3)}.items():
        (band,) = artists(figure, f"{name}|xbar_r|mean|upper")
        heights = band.get_paths()[0].vertices[:, 1]
        assert heights.min() == pytest.approx(8.0 + inner * sigma, abs=1e-9)
        assert heights.max() == pytest.approx(8.0 + outer * sigma, abs=1e-9)
    assert not [
        a for ax in figure.axes for a in ax.collections if (a.get_gid() or "").endswith("|range|upper")
    ]


def test_the_lower_cusum_is_drawn_below_zero_and_far_sums_are_noted():
    """CUSUM: the lower sum is plotted negated; sums far beyond the limit leave the panel with a note."""
    lines = []
    for i in range(30):
        upper_sum = max(0.0, (i - 10) * 2.0)
        lines.append(
            point_line(i, "cusum", "cusum_upper", upper_sum, center=0.0, half_width=None) | {"upper": 5.0}
        )
        lines.append(
            point_line(i, "cusum", "cusum_lower", 0.3 * (i % 3), center=0.0, half_width=None) | {"upper": 5.0}
        )
    lines += [signal_line(i, "cusum", "cusum_upper", "beyond_limits", (i - 10) * 2.0) for i in range(13, 30)]
    figure = draw_figure(one_picture(lines))
    lower = the_line(figure, "points|cusum|cusum_lower")
    assert list(lower.get_ydata()) == pytest.approx([-0.3 * (i % 3) for i in range(30)])
    assert the_line(figure, "limit-upper|cusum|cusum_lower").get_ydata()[0] == pytest.approx(-5.0)
    assert len(the_line(figure, "signals|cusum|cusum_upper|beyond_limits").get_xdata()) == 17
    (note,) = artists(figure, "clipped-note")
    assert "38" in note.get_text()


def test_the_distribution_panel_shows_the_readings_the_parent_and_both_laws_of_the_mean():
    """The histogram holds every baseline reading; the three curves are the arrays given."""
    laws = gamma_laws()
    picture = one_picture(xbar_r_lines(20)).with_distribution(laws)
    figure = draw_figure(picture)
    bars = artists(figure, "histogram")
    assert bars
    widths = np.array([bar.get_width() for bar in bars])
    heights = np.array([bar.get_height() for bar in bars])
    assert float((widths * heights).sum()) == pytest.approx(1.0)  # a density histogram of all the readings
    for gid, x, y in (
        ("parent-density", laws.parent_x, laws.parent_density),
        ("mean-law", laws.mean_x, laws.mean_density),
        ("normal-law", laws.mean_x, laws.normal_density),
    ):
        line = the_line(figure, gid)
        assert np.array_equal(line.get_xdata(), x)
        assert np.array_equal(line.get_ydata(), y)
    assert figure_size_px(picture)[1] > figure_size_px(picture.with_distribution(None))[1]


def test_the_histogram_falls_back_to_the_pictures_baseline_readings():
    """Laws given without readings take the picture's own baseline readings for the histogram."""
    laws = gamma_laws()
    bare = DistributionLaws.from_arrays(
        "gamma, shape 6",
        parent_x=laws.parent_x,
        parent_density=laws.parent_density,
        mean_x=laws.mean_x,
        mean_density=laws.mean_density,
        normal_density=laws.normal_density,
        subgroup_size=4,
    )
    readings = tuple(float(v) for v in np.random.default_rng(2).gamma(6.0, 7.0, size=64))
    picture = replace(one_picture(xbar_r_lines(10)), baseline_readings=readings).with_distribution(bare)
    figure = draw_figure(picture)
    bars = artists(figure, "histogram")
    edges = sorted(bar.get_x() for bar in bars)
    assert edges[0] == pytest.approx(min(readings))
    assert "64 baseline readings" in " ".join(summarize(picture)[-1].sentences)
    assert not artists(draw_figure(replace(picture, baseline_readings=())), "histogram")


def test_distribution_arrays_of_different_lengths_are_refused():
    """A density array that does not match its x grid is an error, not a silently shifted curve."""
    with pytest.raises(ReportError, match="differ in length"):
        DistributionLaws.from_arrays(
            "normal",
            parent_x=[1, 2, 3],
            parent_density=[0.1, 0.2],
            mean_x=[1, 2],
            mean_density=[1, 2],
            normal_density=[1, 2],
            subgroup_size=5,
        )


def test_every_rule_has_its_own_marker_shape_and_a_palette_colour():
    """Signals differ by shape as well as colour (greyscale prints), and every colour is Okabe-Ito."""
    markers = [style.marker for style in RULE_STYLES.values()]
    assert len(set(markers)) == len(markers) == len(RuleId)
    assert {style.color for style in RULE_STYLES.values()} <= set(OKABE_ITO.values())


def test_data_lines_use_the_palette_and_limits_are_dashed():
    """Points, limits and center lines take their colours from the palette; limits are dashed, centers solid."""
    figure = draw_figure(one_picture(xbar_r_lines(20)))
    palette = {c.lower() for c in OKABE_ITO.values()}
    assert to_hex(the_line(figure, "points|xbar_r|mean").get_color()) in palette
    limit = the_line(figure, "limit-upper|xbar_r|mean")
    assert to_hex(limit.get_color()) in palette
    assert limit.get_linestyle() == "--"
    assert the_line(figure, "center|xbar_r|mean").get_linestyle() == "-"


def test_a_chart_with_no_points_yet_still_gets_a_picture(tmp_path):
    """A chart still collecting its baseline draws a short note instead of failing."""
    picture = ChartPicture(chart="kiln-9/temperature", series={})
    figure = draw_figure(picture)
    assert artists(figure, "empty-note")
    path = render_png(picture, tmp_path / "empty.png")
    with Image.open(path) as image:
        assert image.size == figure_size_px(picture)


# ---------------------------------------------------------------- files


def test_the_png_is_a_valid_image_of_the_promised_size_and_not_blank(tmp_path):
    """render_png writes a PNG that decodes, has the computed size, and has real contrast in it."""
    picture = one_picture(xbar_r_lines(40))
    path = render_png(picture, tmp_path / "deep" / "chart.png")
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    with Image.open(path) as image:
        image.verify()
    with Image.open(path) as image:
        assert image.format == "PNG"
        assert image.size == figure_size_px(picture)
        assert image.size[0] == WIDTH_PX == 1200
        grey = np.asarray(image.convert("L"), dtype=np.float64)
    assert grey.std() > 10.0
    assert (grey < 100).mean() > 0.005  # dark ink: points, text and axes, not a pale wash


def test_the_html_page_is_self_contained_and_its_image_decodes(tmp_path):
    """No http(s) address in any src or href, no script; the inline PNG decodes to the figure's size."""
    picture = one_picture(xbar_r_lines(40)).with_distribution(gamma_laws())
    path = render_html(picture, tmp_path / "chart.html")
    page = path.read_text(encoding="utf-8")
    assert page.startswith("<!DOCTYPE html>")
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", page, re.IGNORECASE)
    assert "<script" not in page.lower()
    assert "default-src 'none'" in page
    sources = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', page)
    assert len(sources) == 1
    with Image.open(io.BytesIO(base64.b64decode(sources[0]))) as image:
        assert image.format == "PNG"
        assert image.size == figure_size_px(picture)


def test_the_html_page_names_every_rule_that_fired_and_carries_the_caution():
    """Each fired rule appears by its id and in words, with its count; the advisory caution is on the page."""
    lines = xbar_r_lines(40)
    page = html_page(one_picture(lines))
    for rule in {line["rule"] for line in lines if line["type"] == "signal"}:
        assert rule in page
        assert RULE_STYLES[rule].words in page
    assert "same_side_run fired 3 times" in page
    assert CAUTION in page
    assert "hugging_center" not in page


def test_the_summary_counts_points_limits_and_signals_per_panel():
    """The plain-language summary states how many points, the limits, and the signals per rule and side."""
    summaries = summarize(one_picture(xbar_r_lines(40)))
    means = " ".join(summaries[0].sentences)
    assert summaries[0].title == "Subgroup means (n = 5)"
    assert "40 subgroup means plotted, subgroups 0 to 39" in means
    assert "beyond_limits fired 2 times" in means
    assert "1 lower, 1 upper" in means
    assert "upper limit 8.0537" in means
    ranges = " ".join(summaries[1].sentences)
    assert "beyond_limits fired once" in ranges


# ---------------------------------------------------------------- the demo plant and the store


def test_a_replay_of_the_demo_plant_renders_a_picture_per_chart(demo_replay, tmp_path):
    """Every configured chart of the tile plant gets a PNG whose plotted points match the replay's lines."""
    config = load_config(DEMO_CONFIG)
    lines = read_lines(demo_replay)
    pictures = pictures_from_replay(lines, config=config)
    assert list(pictures) == [chart.id for chart in config.charts]
    for chart, picture in pictures.items():
        path = render_png(picture, tmp_path / f"{chart.replace('/', '-')}.png")
        with Image.open(path) as image:
            assert image.size == figure_size_px(picture)
            assert np.asarray(image.convert("L"), dtype=np.float64).std() > 10.0
        figure = draw_figure(picture)
        points = Counter(
            (line["kind"], line["statistic"])
            for line in lines
            if line["type"] == "point" and line["chart"] == chart
        )
        signals = Counter(
            (line["kind"], line["statistic"], line["rule"])
            for line in lines
            if line["type"] == "signal" and line["chart"] == chart
        )
        for (kind, statistic), count in points.items():
            assert len(the_line(figure, f"points|{kind}|{statistic}").get_xdata()) == count
        for (kind, statistic, rule), count in signals.items():
            assert len(the_line(figure, f"signals|{kind}|{statistic}|{rule}").get_xdata()) == count
    assert pictures["press-2/thickness"].baseline is not None


def stored_rows(chart: str, count: int) -> CommitBatch:
    """Rows as the daemon writes them: subgroups of 3 to 5 with means and standard deviations, a few signals."""
    subgroups, signals = [], []
    for i in range(25, 25 + count):
        n = 3 + i % 3
        half = 3 * 0.5 / np.sqrt(n)
        mean = 42.0 + 0.1 * np.sin(i)
        points = {
            "xbar_s": {
                "mean": {"value": mean, "center": 42.0, "lower": 42.0 - half, "upper": 42.0 + half},
                "sd": {"value": 0.5 + 0.05 * np.cos(i), "center": 0.47, "lower": 0.0, "upper": 1.1},
            }
        }
        subgroups.append(
            SubgroupRow(chart, i, 1_772_431_200_000 + 60_000 * i, 1_772_431_260_000 + 60_000 * i, n, points)
        )
    for i, rule in ((30, "beyond_limits"), (31, "middle_zone_cluster"), (32, "middle_zone_cluster")):
        signals.append(
            SignalRow(
                chart, i, "xbar_s", "mean", rule, "upper", 42.9, 42.0, 41.3, 42.7, 3.2, 0.0007, "normal", None
            )
        )
    detail = {
        "kind": "phase_one_estimate",
        "schema": 1,
        "parameters": {"mean": 42.0, "sigma": 0.5, "source": "baseline"},
        "estimator": "sd",
        "subgroups": 25,
        "used": 25,
        "excluded": [],
        "rounds": 1,
        "settled": True,
    }
    limits = [LimitsRow(chart, 1, 42.0, 0.5, "baseline", detail, 1_772_431_200_000)]
    return CommitBatch(subgroups=subgroups, signals=signals, limits=limits)


async def test_pictures_from_a_sqlite_store_hold_the_committed_rows(tmp_path):
    """Subgroups, signals and the baseline committed with the store come back as one picture, drawn in full."""
    chart = "glaze-7/coat-weight"
    store = await Store.open("sqlite:///" + str(tmp_path / "monitor.db"))
    try:
        await store.commit(stored_rows(chart, 30))
        await store.commit(stored_rows("glaze-8/coat-weight", 5))
        pictures = await pictures_from_store(store, [chart], config=None)
    finally:
        await store.close()
    assert list(pictures) == [chart]
    picture = pictures[chart]
    means = picture.series[ChartKind.XBAR_S, Statistic.MEAN]
    assert [p.subgroup for p in means.points] == list(range(25, 55))
    assert [p.n for p in means.points][:3] == [4, 5, 3]
    assert means.points[0].time == pytest.approx(1_772_431_260 + 60 * 25)
    assert [(s.subgroup, s.rule) for s in means.signals] == [
        (30, "beyond_limits"),
        (31, "middle_zone_cluster"),
        (32, "middle_zone_cluster"),
    ]
    assert picture.baseline is not None
    assert picture.baseline.subgroups == 25
    figure = draw_figure(picture)
    assert len(the_line(figure, "points|xbar_s|mean").get_xdata()) == 30
    assert len(the_line(figure, "points|xbar_s|sd").get_xdata()) == 30
    assert len(the_line(figure, "signals|xbar_s|mean|middle_zone_cluster").get_xdata()) == 2
    assert the_line(figure, "limit-upper|xbar_s|mean").get_drawstyle() == "steps-mid"
    assert artists(figure, "baseline")


async def test_readings_of_stored_baseline_subgroups_feed_the_histogram(tmp_path):
    """Baseline subgroups stored uncharted with their readings become the picture's baseline readings."""
    if "values" not in {f.name for f in fields(SubgroupRow)}:
        pytest.skip("this store does not keep the readings of subgroups")
    chart = "glaze-7/coat-weight"
    baseline = [
        SubgroupRow(chart, i, None, None, 3, {}, values=(42.0 + i / 100, 41.9, 42.1)) for i in range(25)
    ]
    batch = stored_rows(chart, 5)
    batch.subgroups[:0] = baseline
    store = await Store.open("sqlite:///" + str(tmp_path / "monitor.db"))
    try:
        await store.commit(batch)
        picture = (await pictures_from_store(store, [chart]))[chart]
    finally:
        await store.close()
    assert len(picture.baseline_readings) == 75
    assert picture.baseline_readings[:3] == pytest.approx((42.0, 41.9, 42.1))
    assert [p.subgroup for p in picture.series[ChartKind.XBAR_S, Statistic.MEAN].points] == list(
        range(25, 30)
    )


# ---------------------------------------------------------------- the command


def report_parser() -> argparse.ArgumentParser:
    """The parser as the integrator builds it: a `monitor` parser with `report` registered on it."""
    parser = argparse.ArgumentParser(prog="monitor")
    commands = parser.add_subparsers(dest="command", required=True)
    add_report_command(commands)
    return parser


def run_report(*argv: str) -> int:
    args = report_parser().parse_args(["report", *argv])
    return int(args.run(args))


def test_the_report_command_writes_one_file_per_chart_and_format_and_says_where(
    demo_replay, tmp_path, capsys
):
    """`report --replay ... --format both` writes a PNG and an HTML page per chart and prints each path."""
    out = tmp_path / "pictures"
    status = run_report(
        "--config",
        str(DEMO_CONFIG),
        "--replay",
        str(demo_replay),
        "--chart",
        "press-2/thickness",
        "--chart",
        "sort-1/rejects",
        "--out",
        str(out),
        "--format",
        "both",
    )
    assert status == 0
    names = sorted(p.name for p in out.iterdir())
    assert names == [
        "press-2-thickness.html",
        "press-2-thickness.png",
        "sort-1-rejects.html",
        "sort-1-rejects.png",
    ]
    printed = capsys.readouterr().out.splitlines()
    assert printed == [
        f"wrote {out / name}"
        for name in (
            "press-2-thickness.png",
            "press-2-thickness.html",
            "sort-1-rejects.png",
            "sort-1-rejects.html",
        )
    ]


def test_the_report_command_reads_the_store_named_in_the_configuration(tmp_path, capsys):
    """`report --store` draws every chart the database holds, found through the configuration's storage URL."""
    database = tmp_path / "plant.db"
    config = tmp_path / "plant.yaml"
    config.write_text(
        textwrap.dedent(f"""\
        storage: {{url: "sqlite:///{database}"}}
        charts:
          - id: glaze-7/coat-weight
            title: Glaze coat weight on line 7
            unit: g
            subgroup: {{window: 1m, min_size: 3}}
            kinds: [xbar_s]
            limits: {{baseline: {{subgroups: 25}}}}
        """)
    )

    async def fill() -> None:
        store = await Store.open(f"sqlite:///{database}")
        try:
            await store.commit(stored_rows("glaze-7/coat-weight", 12))
        finally:
            await store.close()

    asyncio.run(fill())
    assert run_report("--config", str(config), "--store", "--out", str(tmp_path / "out")) == 0
    assert capsys.readouterr().out.strip() == f"wrote {tmp_path / 'out' / 'glaze-7-coat-weight.png'}"
    assert (
        run_report(
            "--config", str(config), "--store", "--chart", "glaze-9/coat-weight", "--out", str(tmp_path)
        )
        == 1
    )
    assert capsys.readouterr().err == (
        "error: nothing charted for glaze-9/coat-weight in the database (charts there: glaze-7/coat-weight)\n"
    )


def test_the_store_mode_refuses_a_missing_database_without_creating_one(tmp_path, capsys):
    """With no database file the command says so in one line and leaves no empty database behind."""
    database = tmp_path / "absent.db"
    config = tmp_path / "plant.yaml"
    config.write_text(
        f'storage: {{url: "sqlite:///{database}"}}\ncharts:\n  - id: a/b\n    kinds: [individuals_mr]\n'
        "    limits: {mean: 1.0, sigma: 0.1}\n"
    )
    assert run_report("--config", str(config), "--store", "--out", str(tmp_path / "out")) == 1
    error = capsys.readouterr().err
    assert error.count("\n") == 1
    assert error.startswith("error: no database at")
    assert not database.exists()


def test_an_unknown_chart_is_one_clear_line_naming_the_charts_there(demo_replay, tmp_path, capsys):
    """Asking for a chart the replay does not hold fails with one line that lists the charts it does hold."""
    status = run_report(
        "--config",
        str(DEMO_CONFIG),
        "--replay",
        str(demo_replay),
        "--chart",
        "press-3/thickness",
        "--out",
        str(tmp_path),
    )
    assert status == 1
    error = capsys.readouterr().err
    assert error.count("\n") == 1
    assert "press-3/thickness" in error
    assert "press-2/thickness" in error


def test_a_missing_replay_file_fails_in_one_line_without_a_traceback(tmp_path):
    """Run as a process, a missing input ends with status 1 and a single line on standard error."""
    result = subprocess.run(
        [
            sys.executable,
            "-m",
            "monitor.report",
            "--config",
            str(DEMO_CONFIG),
            "--replay",
            str(tmp_path / "nothing.jsonl"),
            "--out",
            str(tmp_path),
        ],
        capture_output=True,
        text=True,
        check=False,
        timeout=120,
        cwd=ROOT,
    )
    assert result.returncode == 1
    assert result.stderr.strip().splitlines() == [f"error: {tmp_path / 'nothing.jsonl'}: no such file"]
    assert "Traceback" not in result.stderr


def test_the_report_help_gives_examples(capsys):
    """`monitor report --help` shows the sources, the formats and worked examples."""
    with pytest.raises(SystemExit):
        report_parser().parse_args(["report", "--help"])
    shown = capsys.readouterr().out
    for text in ("--replay", "--store", "--chart", "--format", "examples:", "monitor report --config"):
        assert text in shown


def test_one_of_replay_or_store_is_required(capsys):
    """Giving neither source is a usage error from argparse, before anything is read."""
    with pytest.raises(SystemExit) as stop:
        report_parser().parse_args(["report", "--config", "x.yaml", "--out", "o"])
    assert stop.value.code == 2
    assert "--replay" in capsys.readouterr().err


def test_drawing_never_loads_pyplot_and_uses_the_agg_canvas():
    """In a fresh interpreter, drawing a picture leaves matplotlib.pyplot unimported and draws on Agg."""
    code = textwrap.dedent("""\
        import sys
        from tests.test_report import one_picture, xbar_r_lines
        from monitor.report import draw_figure
        figure = draw_figure(one_picture(xbar_r_lines(10)))
        print(type(figure.canvas).__name__, "matplotlib.pyplot" in sys.modules)
        """)
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=120, cwd=ROOT
    )
    assert result.stdout.split() == ["FigureCanvasAgg", "False"]


def test_main_runs_the_report_on_its_own(demo_replay, tmp_path, capsys):
    """`python -m monitor.report` (until the command is wired into `monitor`) takes the same arguments."""
    assert (
        main(
            [
                "--config",
                str(DEMO_CONFIG),
                "--replay",
                str(demo_replay),
                "--chart",
                "kiln-1/zone-3-temperature",
                "--out",
                str(tmp_path),
                "--format",
                "html",
            ]
        )
        == 0
    )
    page = (tmp_path / "kiln-1-zone-3-temperature.html").read_text(encoding="utf-8")
    assert "Zone 3 temperature of kiln 1" in page
    assert CAUTION in page


def test_importing_the_report_module_loads_neither_matplotlib_nor_the_database_layer():
    """Registering the command keeps `monitor` light: matplotlib and SQLAlchemy load only when used."""
    code = "import sys, monitor.report; print(sorted({m.split('.')[0] for m in sys.modules} & {'matplotlib', 'sqlalchemy'}))"
    result = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, timeout=60, cwd=ROOT
    )
    assert result.stdout.strip() == "[]"


# ---------------------------------------------------------------- the fitted distribution panel


def test_a_fitted_distribution_integrates_to_one_and_its_mean_law_is_the_gamma_law():
    """For a gamma parent the mean of n readings is gamma(n shape, scale / n) (sum of gammas, common
    practice, no source): the panel's curve matches scipy.stats.gamma; both densities integrate to ~1."""
    readings = np.random.default_rng(31).gamma(4.0, 2.0, 300)
    parent = Parent.of("gamma", shape=4.0, scale=2.0)
    laws = fitted_distribution(readings, 4, parent=parent)
    shape, scale = parent.param("shape"), parent.param("scale")
    assert laws.mean_density == pytest.approx(
        stats.gamma.pdf(laws.mean_x, 4 * shape, scale=scale / 4), abs=1e-6
    )
    normal = stats.norm.pdf(laws.mean_x, shape * scale, np.sqrt(shape) * scale / 2)
    assert laws.normal_density == pytest.approx(normal, rel=1e-9, abs=1e-12)
    assert laws.parent_density == pytest.approx(stats.gamma.pdf(laws.parent_x, shape, scale=scale), rel=1e-9)
    for x, y in ((laws.parent_x, laws.parent_density), (laws.mean_x, laws.mean_density)):
        assert np.trapezoid(y, x) == pytest.approx(1.0, abs=1e-3)
    assert laws.parent_x.min() <= readings.min()
    assert laws.parent_x.max() >= readings.max()
    assert laws.readings is not None
    assert laws.readings.size == readings.size
    assert laws.law_method == "closed form"


def test_the_panels_law_of_the_mean_of_a_weibull_parent_matches_a_direct_convolution():
    """The mean of two readings has density 2 * integral f(y) f(2x - y) dy, here by scipy.integrate.quad
    over scipy's Weibull density: the panel's curve (from laws.law_of_mean) agrees to 1e-4 of its peak,
    far below what a picture can show."""
    readings = np.random.default_rng(4).weibull(1.5, 300) * 3.0
    parent = Parent.of("weibull", shape=1.5, scale=3.0)
    laws = fitted_distribution(readings, 2, parent=parent)
    weibull = stats.weibull_min(1.5, scale=3.0)
    peak = float(laws.mean_density.max())
    assert laws.mean_x.min() >= 0.0  # the mean of positive readings is positive
    for i in (0, 1, 2, *range(10, laws.mean_x.size, 37)):
        x = float(laws.mean_x[i])
        direct, _ = integrate.quad(
            lambda y, x=x: weibull.pdf(y) * weibull.pdf(2 * x - y), 0.0, 2 * x, limit=200
        )
        assert laws.mean_density[i] == pytest.approx(2.0 * direct, abs=1e-4 * peak)
    assert np.trapezoid(laws.mean_density, laws.mean_x) == pytest.approx(1.0, abs=1e-3)


def test_too_few_baseline_readings_give_no_panel_and_say_why():
    """A parent model needs 20 readings: fewer leave the picture without the panel and say so."""
    picture = replace(one_picture(xbar_r_lines(10)), baseline_readings=tuple(np.linspace(7.9, 8.1, 12)))
    same, note = with_fitted_distribution(picture)
    assert same.distribution is None
    assert note is not None
    assert "12 baseline readings" in note
    assert with_fitted_distribution(one_picture(xbar_r_lines(10))) == (one_picture(xbar_r_lines(10)), None)


def demo_csv_values(path: Path, chart: str) -> list[float]:
    with path.open(newline="") as handle:
        return [float(row["value"]) for row in csv.DictReader(handle) if row["chart"] == chart]


def test_the_replay_report_with_its_data_draws_the_distribution_panel_of_the_baseline(
    demo_replay, tmp_path, capsys
):
    """`report --replay --data` fits the parent to the replay's Phase I readings (excluded subgroups left out):
    the histogram counts sum to those readings, and the PNG and HTML both carry the panel."""
    data = demo_replay.parent / "readings.csv"
    out = tmp_path / "pictures"
    chart = "dryer-1/drying-time"  # subgroups of 4, a baseline of 25, skewed drying times
    argv = ["--config", str(DEMO_CONFIG), "--replay", str(demo_replay), "--chart", chart, "--out", str(out)]
    assert run_report(*argv, "--data", str(data), "--format", "both") == 0
    baseline = next(
        line for line in read_lines(demo_replay) if line["type"] == "baseline" and line["chart"] == chart
    )
    left_out = {e["subgroup"] for e in baseline["excluded"]}
    values = demo_csv_values(data, chart)
    expected = [v for i in range(25) if i not in left_out for v in values[4 * i : 4 * i + 4]]
    pictures = baseline_readings_from_data(
        pictures_from_replay(read_lines(demo_replay), config=load_config(DEMO_CONFIG)),
        data,
        load_config(DEMO_CONFIG),
    )
    picture, note = with_fitted_distribution(pictures[chart], load_config(DEMO_CONFIG).charts[4])
    assert note is None
    assert picture.baseline_readings == pytest.approx(expected)
    laws = picture.distribution
    assert laws is not None
    assert laws.subgroup_size == 4
    figure = draw_figure(picture)
    bars = artists(figure, "histogram")
    counts = [bar.get_height() * bar.get_width() * len(expected) for bar in bars]
    assert sum(round(c) for c in counts) == len(expected) == 4 * baseline["used"]
    assert np.allclose(counts, np.round(counts), atol=1e-6)
    assert np.array_equal(the_line(figure, "mean-law").get_ydata(), laws.mean_density)
    with Image.open(out / "dryer-1-drying-time.png") as image:
        assert image.size == figure_size_px(picture)
        assert image.size[1] > figure_size_px(picture.with_distribution(None))[1]
    page = (out / "dryer-1-drying-time.html").read_text()
    assert "<h2>Distribution</h2>" in page
    assert f"a histogram of {len(expected)} baseline readings" in page
    # without --data there are no readings, and --no-distribution leaves the panel out on purpose
    assert run_report(*argv, "--format", "html") == 0
    assert "<h2>Distribution</h2>" not in (out / "dryer-1-drying-time.html").read_text()
    assert run_report(*argv, "--data", str(data), "--no-distribution", "--format", "html") == 0
    assert "<h2>Distribution</h2>" not in (out / "dryer-1-drying-time.html").read_text()


def test_data_goes_with_replay_only(tmp_path, capsys):
    """--data names the file a replay ran on; with --store it is refused in one line."""
    config = tmp_path / "plant.yaml"
    config.write_text(
        "charts:\n  - id: a/b\n    kinds: [individuals_mr]\n    limits: {mean: 1.0, sigma: 0.1}\n"
    )
    argv = ("--config", str(config), "--store", "--data", "x.csv", "--out", str(tmp_path))
    assert run_report(*argv) == 1
    assert (
        capsys.readouterr().err
        == "error: --data goes with --replay: the store keeps the baseline readings itself\n"
    )


async def test_the_store_gives_the_readings_the_limits_came_from(tmp_path):
    """Uncharted baseline subgroups less the excluded ones; or, for limits set by `monitor baseline`
    from the stored history, the stored subgroups of its span less its exclusions."""
    if "values" not in {f.name for f in fields(SubgroupRow)}:
        pytest.skip("this store does not keep the readings of subgroups")
    chart = "glaze-7/coat-weight"
    rng = np.random.default_rng(6)
    batch = stored_rows(chart, 10)
    batch.subgroups[:0] = [
        SubgroupRow(chart, i, None, None, 3, {}, values=tuple(float(v) for v in rng.normal(42.0, 0.5, 3)))
        for i in range(25)
    ]
    detail = dict(batch.limits[0].detail)
    detail["excluded"] = [
        {"subgroup": 3, "statistic": "sd", "value": 1.9, "lower": 0.0, "upper": 1.1, "round": 1}
    ]
    batch.limits[0] = replace(batch.limits[0], detail=detail)
    charted = [
        replace(row, values=tuple(float(v) for v in rng.normal(42.0, 0.5, row.n)))
        for row in batch.subgroups[25:]
    ]
    batch.subgroups[25:] = charted
    store = await Store.open("sqlite:///" + str(tmp_path / "monitor.db"))
    try:
        await store.commit(batch)
        picture = (await pictures_from_store(store, [chart]))[chart]
        assert len(picture.baseline_readings) == 3 * 24
        assert picture.baseline_readings[:3] == pytest.approx(batch.subgroups[0].values)
        assert picture.baseline_readings[9:12] == pytest.approx(batch.subgroups[4].values)  # 3 left out
        later = LimitsRow(
            chart, 2, 42.1, 0.4, "baseline",
            {"by": "monitor baseline", "data": "stored history", "subgroups": [26, 34],
             "excluded": [{"subgroup": 28}]},
            1_772_431_900_000,
        )  # fmt: skip
        await store.commit(CommitBatch(limits=[later]))
        picture = (await pictures_from_store(store, [chart]))[chart]
    finally:
        await store.close()
    expected = [v for row in charted if 26 <= row.index <= 34 and row.index != 28 for v in row.values]
    assert len(expected) >= 20
    assert list(picture.baseline_readings) == pytest.approx(expected)
    with_panel, note = with_fitted_distribution(picture)
    assert note is None
    assert with_panel.distribution is not None
    assert with_panel.distribution.subgroup_size == 4  # the most common size of the charted means
