"""The HTML report: content, self-containment, escaping, geometry of the plots, a real browser."""

from __future__ import annotations

import csv
import io
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from typer.testing import CliRunner

from guardband.planner.cli import app
from guardband.planner.report import map_data, model_warnings, slice_data
from guardband.planner.step import ModelSummary
from guardband.planner.app.workflow import LOG_NAME, rerun_record
from guardband.safety import ledger
from guardband.safety.cautions import DOSE, cautions_for
from guardband.safety.screen import REASONS, limit_probability

from conftest import PROTOCOLS

POOL = "300"
runner = CliRunner()


def _invoke(args):
    result = runner.invoke(app, [str(a) for a in args])
    return result


# ----------------------------------------------------------- page structure
class _Sections(HTMLParser):
    """Text and element counts per <section id=...> of a page, and the order of sections."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.order: list[str] = []
        self.text: dict[str, list[str]] = {}
        self.tags: dict[str, dict[str, int]] = {}
        self._stack: list[str | None] = []
        self._depth = 0

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "section":
            sid = attrs.get("id", "")
            self.order.append(sid)
            self.text.setdefault(sid, [])
            self.tags.setdefault(sid, {})
            self._stack.append(sid)
        current = next((s for s in reversed(self._stack) if s), None)
        if current is not None:
            self.tags[current][tag] = self.tags[current].get(tag, 0) + 1

    def handle_endtag(self, tag):
        if tag == "section" and self._stack:
            self._stack.pop()

    def handle_data(self, data):
        current = next((s for s in reversed(self._stack) if s), None)
        if current is not None:
            self.text[current].append(data)

    def joined(self, sid: str) -> str:
        return re.sub(r"\s+", " ", " ".join(self.text.get(sid, [])))


def _sections(html: str) -> _Sections:
    parser = _Sections()
    parser.feed(html)
    return parser


def _exclusion_counts(path: Path) -> dict[str, int]:
    """Candidates per outcome, read from the exclusion table the plan wrote (an independent path)."""
    lines = [line for line in path.read_text(encoding="utf-8").splitlines() if not line.startswith("#")]
    counts = {"survived": 0, **{r: 0 for r in REASONS}}
    for row in csv.DictReader(io.StringIO("\n".join(lines))):
        counts["survived" if row["status"] == "survived" else row["reason"]] += 1
    return counts


def _plan(protocol, runs, out, *extra):
    result = _invoke(["plan", protocol, runs, "--out", out, "--pool", POOL, *extra])
    assert result.exit_code == 0, result.output
    return result


@pytest.fixture(scope="module")
def dose_campaign(tmp_path_factory):
    out = tmp_path_factory.mktemp("dose")
    _plan(PROTOCOLS / "dose_combination.toml", PROTOCOLS / "dose_combination_runs.csv", out, "--report")
    return out


@pytest.fixture(scope="module")
def tablet_campaign(tmp_path_factory):
    out = tmp_path_factory.mktemp("tablet")
    _plan(PROTOCOLS / "tablet_blend.toml", PROTOCOLS / "tablet_blend_runs.csv", out, "--report", "--count", "1")
    return out


def _only_plan(folder: Path) -> dict:
    records = ledger.read_records(folder / LOG_NAME)
    (rec,) = [r for r in records if r["kind"] == "plan"]
    return rec


@pytest.mark.parametrize("which", ["dose_campaign", "tablet_campaign"], ids=["dose", "tablet"])
def test_report_lists_everything_with_cautions_first(which, request):
    folder = request.getfixturevalue(which)
    rec = _only_plan(folder)
    body = rec["body"]
    label = body["step_label"]
    html = (folder / f"report-{label}.html").read_text(encoding="utf-8")
    page = _sections(html)

    # the cautions come first, before any table or plot, and all of them
    assert page.order[0] == "cautions"
    assert html.index('id="cautions"') < html.index("<table") < html.index("<svg")
    kind = "dose" if "dose" in which else "formulation"
    caution_text = page.joined("cautions")
    for c in cautions_for(kind):
        assert c in caution_text
    if kind == "dose":
        assert all(c in caution_text for c in DOSE)

    # fingerprints and the log's head and count
    head, count = ledger.head_and_count(folder / LOG_NAME)
    facts = page.joined("fingerprints")
    for value in (body["protocol_fingerprint"], body["runs_file"]["sha256"], body["tool_version"],
                  str(body["seed"]), head, f"{count} record", rec["hash"]):
        assert value in facts

    # every proposal, with all four ranking values as columns
    batch = page.joined("batch")
    assert body["proposals"], "the example protocols must propose runs"
    for prop in body["proposals"]:
        assert f"{label}-{prop['rank']:02d}" in batch
    for column in ("ei", "pi", "bound", "mean", "joint"):
        assert re.search(rf"\b{column}\b", batch)
    # each limit's figure is described as that limit is judged (the dose limit: its true value)
    if kind == "dose":
        assert "true value" in batch and "new measurement" not in batch
    else:
        assert "probability that a new measurement meets it" in batch

    # every near miss, and the counts as in the exclusion table the plan wrote
    exclusions = page.joined("exclusions")
    for miss in body["near_misses"]:
        assert f"#{miss['candidate']}" in exclusions
    counts = _exclusion_counts(folder / body["exclusion_table"]["file"])
    assert counts == body["counts"]
    for rule, n in counts.items():
        assert re.search(rf"{re.escape(rule)} {n}\b", exclusions), (rule, n)

    # one slice figure per proposal, the map, the model checks and the history, and the rule
    # comparison and the price of the threshold when the step found them; each also as PNG
    n_figures = len(body["proposals"]) + 3 + bool(body["rule_picks"]) + bool(body["threshold_price"])
    assert html.count("<svg") == n_figures
    pngs = sorted((folder / f"figures-{label}").glob("*.png"))
    assert len(pngs) == n_figures
    for png in pngs:
        with Image.open(png) as im:
            im.verify()
    assert sum(page.tags[s].get("svg", 0) for s in ("risk", "slices", "map", "models", "history")) == n_figures

    # model checks: the coverage shown is the one recorded by the planning step
    models = page.joined("models")
    for m in body["models"]:
        if m["loo_coverage"] is not None:
            assert f"{100 * m['loo_coverage']:.0f}%" in models


@pytest.mark.parametrize("which", ["dose_campaign", "tablet_campaign"], ids=["dose", "tablet"])
def test_report_is_self_contained(which, request):
    folder = request.getfixturevalue(which)
    label = _only_plan(folder)["body"]["step_label"]
    html = (folder / f"report-{label}.html").read_text(encoding="utf-8")
    assert not re.search(r"""(?:src|href)\s*=\s*["']?\s*(?:https?:)?//""", html, re.I)
    assert not re.search(r"<\s*(?:link|script|img|iframe|object|embed)\b", html, re.I)
    assert "@import" not in html
    # every url(...) and every href points inside the page (matplotlib embeds a colour bar
    # as an inline PNG data URI, which is part of the page)
    assert all(ref.startswith("#") for ref in re.findall(r"url\(\s*([^)\s]*)", html))
    refs = re.findall(r"""href\s*=\s*["']([^"']*)""", html, re.I)
    assert refs and all(ref.startswith(("#", "data:image/png;base64,")) for ref in refs)
    # ids are unique, so that one plot's references cannot point into another plot
    ids = re.findall(r'\bid="([^"]+)"', html)
    assert len(ids) == len(set(ids))


def test_report_from_the_folder_matches_the_one_made_with_the_plan(dose_campaign, tmp_path):
    """`report DIR` re-runs the step from its recorded inputs and draws the same page."""
    folder = tmp_path / "copy"
    shutil.copytree(dose_campaign, folder)
    label = _only_plan(folder)["body"]["step_label"]
    made_with_plan = (folder / f"report-{label}.html").read_bytes()
    result = _invoke(["report", folder, "--format", "json"])
    assert result.exit_code == 0, result.output
    assert (folder / f"report-{label}.html").read_bytes() == made_with_plan
    (entry,) = json.loads(result.stdout)
    assert Path(entry["html"]) == folder / f"report-{label}.html" and entry["problems"] == []
    assert len(entry["figures"]) == len(list((folder / f"figures-{label}").glob("*.png")))


def test_a_step_planned_twice_is_reported_once_from_its_last_record(dose_campaign, tmp_path):
    """Planning the same inputs again gives the same step (label, files); `report DIR` re-ran and
    redrew it once per record, each page overwriting the last."""
    folder = tmp_path / "copy"
    shutil.copytree(dose_campaign, folder)
    _plan(PROTOCOLS / "dose_combination.toml", PROTOCOLS / "dose_combination_runs.csv", folder)
    records = ledger.read_records(folder / LOG_NAME)
    assert [r["body"]["step_label"] for r in records] == [records[0]["body"]["step_label"]] * 2
    result = _invoke(["report", folder, "--format", "json"])
    assert result.exit_code == 0, result.output
    (entry,) = json.loads(result.stdout)
    assert entry["record_index"] == 1


def test_report_says_when_the_rerun_differs_or_the_step_was_superseded(dose_campaign, tmp_path, monkeypatch):
    folder = tmp_path / "copy"
    shutil.copytree(dose_campaign, folder)
    log = folder / LOG_NAME
    ledger.append_record(log, "correction", {"note": "test"}, supersedes=0, reason="R04 was entered twice")
    import guardband.planner.app.workflow as workflow

    real = workflow.plan_step

    def other_seed(protocol, runs, *, seed, **kw):  # a replay that does not reproduce the record
        return real(protocol, runs, seed=seed + 1, **kw)

    monkeypatch.setattr(workflow, "plan_step", other_seed)
    result = _invoke(["report", folder, "--map", "dose_b,dose_a"])
    assert result.exit_code == 5
    assert "different plan table" in result.stderr
    label = _only_plan(folder)["body"]["step_label"]
    html = (folder / f"report-{label}.html").read_text(encoding="utf-8")
    page = _sections(html)
    assert page.order[:2] == ["cautions", "problems"]
    problems = page.joined("problems")
    assert "different plan table" in problems
    assert "superseded by record 1" in problems and "R04 was entered twice" in problems
    assert "Map over dose_b and dose_a" in html


def test_report_refuses_an_unknown_map_factor(dose_campaign, tmp_path):
    folder = tmp_path / "copy"
    shutil.copytree(dose_campaign, folder)
    result = _invoke(["report", folder, "--map", "dose_a,nonesuch"])
    assert result.exit_code == 3
    assert "--map: unknown factor 'nonesuch'" in result.stderr
    result = _invoke(["report", folder, "--map", "dose_a"])
    assert result.exit_code == 2


def test_report_needs_a_decision_log(tmp_path):
    result = _invoke(["report", tmp_path])
    assert result.exit_code == 5
    assert "no decision log" in result.stderr


# ----------------------------------------------------------------- escaping
MARKUP_FACTOR = "<script>alert(1)</script>"
MATH_FACTOR = r"$\nosuchmacro$ & co"
MARKUP_LIMIT = "<i>haze</i>"
MARKUP_PROTOCOL = f"""
seed = 11

[study]
title = 'Names <img src=x onerror=alert(2)> & "quotes"'
version = "1"
author = "<b>someone</b>"

[[factors]]
name = '{MARKUP_FACTOR}'
kind = "continuous"
lower = 0.0
upper = 1.0

[[factors]]
name = '{MATH_FACTOR}'
kind = "continuous"
lower = 0.0
upper = 1.0

[objective]
name = "y"
direction = "maximize"

[[limits]]
name = '{MARKUP_LIMIT}'
upper = 1.0
probability = 0.8

[screen]
threshold = 0.7
min_runs = 4

[batch]
size = 1
pool = 300
refine = 0
"""


def test_names_from_the_protocol_are_shown_as_text(tmp_path):
    protocol = tmp_path / "markup.toml"
    protocol.write_text(MARKUP_PROTOCOL, encoding="utf-8")
    rng = np.random.default_rng(0)
    X = rng.uniform(0.05, 0.95, size=(9, 2))
    y = 10 * X[:, 0] + 5 * np.sin(3 * X[:, 1])
    z = 0.3 + 0.5 * X[:, 0] * X[:, 1]
    rows = [["run_id", MARKUP_FACTOR, MATH_FACTOR, "y", MARKUP_LIMIT]]
    rows += [[f"R{i + 1}", *(f"{v:.4f}" for v in (*X[i], y[i], z[i]))] for i in range(len(y))]
    runs = tmp_path / "runs.csv"
    with runs.open("w", newline="", encoding="utf-8") as fh:
        csv.writer(fh).writerows(rows)
    out = tmp_path / "out"
    _plan(protocol, runs, out, "--report")
    label = _only_plan(out)["body"]["step_label"]
    html = (out / f"report-{label}.html").read_text(encoding="utf-8")
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "&lt;i&gt;haze&lt;/i&gt;" in html and "&lt;b&gt;someone&lt;/b&gt;" in html
    assert "&lt;img src=x onerror=alert(2)&gt;" in html
    assert not re.search(r"<\s*(?:script|img)\b", html, re.I)  # no such element anywhere
    assert "<i>haze" not in html and "<b>someone" not in html
    # the mathtext-looking name was drawn as plain text (matplotlib would reject it as TeX)
    assert r"$\nosuchmacro$ &amp; co" in html


# ----------------------------------------------------------- plot geometry
@pytest.fixture(scope="module")
def tablet_rerun(tablet_campaign):
    return rerun_record(tablet_campaign / LOG_NAME, _only_plan(tablet_campaign)["index"])


def test_mixture_slices_keep_the_total_and_pass_through_the_proposal(tablet_rerun):
    result, _ = tablet_rerun
    p = result.protocol
    space = result.space
    comp = np.array([f.kind == "component" for f in p.factors])
    total = p.mixture.total
    free = np.flatnonzero(space.free)
    for prop in result.proposals:
        for j in free:
            sl = slice_data(result, prop.x, int(j))
            assert sl.t.size >= 2, (prop.rank, p.factor_names[j])
            assert np.all(space.contains(sl.X))
            np.testing.assert_allclose(sl.X[:, comp].sum(axis=1), total, atol=1e-9)
            np.testing.assert_allclose(sl.X[:, j], sl.t, atol=0)
            # the slice goes through the proposal, where the models say what the table says
            k = int(np.argmin(np.abs(sl.t - prop.x[j])))
            np.testing.assert_allclose(sl.X[k], prop.x, atol=1e-12)
            np.testing.assert_allclose(sl.mean[p.objective.name][k], prop.mean, rtol=1e-9, atol=1e-9)
            for lim in p.limits:
                pk = limit_probability(sl.mean[lim.name][k], sl.sd[lim.name][k], lower=lim.lower, upper=lim.upper)
                np.testing.assert_allclose(pk, prop.p[lim.name], rtol=1e-9, atol=1e-12)
            # only factor j and the components that keep the total move
            still = ~comp.copy()
            still[j] = False
            assert np.all(sl.X[:, still] == prop.x[still])


@pytest.mark.parametrize("which,runs_file", [("dose_campaign", "dose_combination_runs.csv"),
                                             ("tablet_campaign", "tablet_blend_runs.csv")], ids=["dose", "tablet"])
def test_slice_cards_show_every_response_against_every_moved_factor(which, runs_file, request):
    """One card per moved factor, a strip per response sharing its axis; the proposal on each curve."""
    from matplotlib.collections import PathCollection, PolyCollection
    from matplotlib.lines import Line2D

    from guardband.planner.inputs.runs import read_runs
    from guardband.planner.report.data import _Geometry
    from guardband.planner.report.figures import draw_slices
    from guardband.planner.step import safe_runs_mask

    folder = request.getfixturevalue(which)
    result, _ = rerun_record(folder / LOG_NAME, _only_plan(folder)["index"])
    p = result.protocol
    runs = read_runs(PROTOCOLS / runs_file, p)
    geo = _Geometry(result)
    prop = result.proposals[0]
    fig, cards = draw_slices(geo, runs, safe_runs_mask(p, runs), prop, "P-01")
    moved = [int(j) for j in geo.free_idx if geo.can_move([j])]
    assert list(cards) == moved and len(moved) >= 2
    responses = p.response_names
    for j, strips in cards.items():
        assert len(strips) == len(responses)
        assert all(s.get_shared_x_axes().joined(strips[0], s) for s in strips)
        sl = slice_data(result, prop.x, j)
        at = float(np.interp(prop.x[j], sl.t, np.arange(sl.t.size))) if sl.discrete else prop.x[j]
        for ax, name in zip(strips, responses):
            lines = [ln for ln in ax.get_lines() if isinstance(ln, Line2D)]
            # no vertical line marks the setting: every line is the curve, a limit or a marker
            assert not any(len(ln.get_xdata()) == 2 and ln.get_xdata()[0] == ln.get_xdata()[1]
                           and ln.get_transform() is not ax.transData for ln in lines if ln.get_marker() in ("None", None, ""))
            stars = [ln for ln in lines if ln.get_marker() == "*"]
            assert len(stars) == 1, (p.factor_names[j], name)
            k = int(np.argmin(np.abs(sl.t - prop.x[j])))
            # the star sits on the drawn centre (a binomial rate: its median, in [0, 1])
            np.testing.assert_allclose(stars[0].get_xydata()[0], [at, sl.band(name)[0][k]], rtol=1e-9,
                                       atol=1e-12)
            if name == p.objective.name:  # on the curve, where the plan table says
                np.testing.assert_allclose(sl.mean[name][k], prop.mean, rtol=1e-9, atol=1e-9)
            texts = " ".join(t.get_text() for t in ax.texts)
            assert name in texts
            lim = next((x for x in p.limits if x.name == name), None)
            if lim is not None:
                levels = {float(ln.get_ydata()[0]) for ln in lines if ln.get_linestyle() == "--"}
                assert {v for v in (lim.lower, lim.upper) if v is not None} <= levels
            if not sl.discrete:
                assert any(isinstance(c, PolyCollection) for c in ax.collections)  # the 95% band
            shown = sum(len(c.get_offsets()) for c in ax.collections if isinstance(c, PathCollection))
            assert shown == int(np.sum(~runs.pending & np.isfinite(runs.Y[name])))  # every run, projected
    for r in range(len(responses)):
        assert len({tuple(strips[r].get_ylim()) for strips in cards.values()}) == 1  # one scale per response


def test_mixture_map_keeps_the_total_and_masks_the_outside(tablet_rerun):
    result, _ = tablet_rerun
    p = result.protocol
    names = p.factor_names
    comp = np.array([f.kind == "component" for f in p.factors])
    md = map_data(result, result.proposals[0].x, ("mcc", "force"), n=25)
    X = md.X.reshape(-1, len(names))
    inside = md.inside.ravel()
    assert np.array_equal(inside, result.space.contains(X))
    assert 0 < inside.sum() < inside.size
    np.testing.assert_allclose(X[:, comp].sum(axis=1), p.mixture.total, atol=1e-9)
    joint = md.joint.ravel()
    assert np.all(np.isnan(joint[~inside])) and np.all(np.isfinite(joint[inside]))
    assert np.all((joint[inside] >= 0) & (joint[inside] <= 1))
    np.testing.assert_allclose(X[:, names.index("force")].reshape(md.inside.shape)[:, 0], md.gy)


# ------------------------------------------------------------------ browser
CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
_CONSOLE = re.compile(r":CONSOLE[(:]|Uncaught", re.I)


def _screenshot(page: Path, tmp_path: Path) -> tuple[np.ndarray, list[str]]:
    shot = tmp_path / f"{page.stem}.png"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / ('profile-' + page.stem)}", f"--screenshot={shot}",
           "--window-size=1200,2000", "--hide-scrollbars", "--enable-logging=stderr", "--v=0",
           page.resolve().as_uri()]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    with Image.open(shot) as im:
        pixels = np.asarray(im.convert("L"), dtype=float)
    return pixels, [line for line in proc.stderr.splitlines() if _CONSOLE.search(line)]


@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed; scripts/install_chromium.sh installs it")
def test_report_loads_in_headless_chromium(tablet_campaign, tmp_path):
    # the console check can fail: a page with a script error is caught
    bad = tmp_path / "broken.html"
    bad.write_text("<!DOCTYPE html><p>x</p><script>no_such_function();</script>", encoding="utf-8")
    _, bad_console = _screenshot(bad, tmp_path)
    assert any("no_such_function" in line for line in bad_console)

    label = _only_plan(tablet_campaign)["body"]["step_label"]
    pixels, console = _screenshot(tablet_campaign / f"report-{label}.html", tmp_path)
    assert console == []
    assert pixels.shape == (2000, 1200)
    # not blank: a white page has no variance; text, tables and the caution box do
    assert pixels.std() > 20
    assert (pixels < 128).mean() > 0.01
    # the caution box (a tinted band) is in the first screenful
    top = pixels[:500]
    assert np.any((top > 200) & (top < 250))


@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed; scripts/install_chromium.sh installs it")
def test_the_rules_and_the_price_render_in_headless_chromium(tablet_campaign, tmp_path):
    label = _only_plan(tablet_campaign)["body"]["step_label"]
    page = tablet_campaign / f"report-{label}.html"
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
           f"--user-data-dir={tmp_path / 'profile-dom'}", "--dump-dom", page.resolve().as_uri()]
    dom = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert dom.returncode == 0, dom.stderr[-2000:]
    html = dom.stdout
    risk = html[html.index('id="risk"'):html.index('id="slices"')]
    # the four predictive distributions and the price curve, drawn (inline SVG) in the browser's DOM
    for fig in ("fig-rules", "fig-price"):
        assert f'id="{fig}"' in risk
        part = risk[risk.index(f'id="{fig}"'):]
        assert "<svg" in part[:part.index("</figure>")]
    for rule in ("mean", "ei", "pi", "bound"):
        assert f"<td>{rule}</td>" in risk
    assert "the price of the threshold" in risk.lower()


# ------------------------------------------------------------ model checks
@pytest.mark.parametrize(
    "coverage, n_runs, status, expected",
    [
        (0.5, 10, "ok", "looks miscalibrated: only 50%"),
        (0.79, 8, "ok", "looks miscalibrated: only 79%"),
        (0.5, 7, "ok", "too few to judge"),
        (0.8, 8, "ok", None),  # at the line: no warning
        (1.0, 14, "ok", None),
        (None, 2, "too-few-runs", "has no usable model"),
    ],
    ids=["low", "just-below", "few-runs", "at-line", "good", "not-fitted"],
)
def test_model_warnings_follow_the_coverage_rule(coverage, n_runs, status, expected):
    # trade practice: about 95% of measured values should fall inside a 95% predictive interval
    summary = ModelSummary("impurity", "limit", n_runs, status, "", loo_coverage=coverage)
    warnings = model_warnings([summary])
    if expected is None:
        assert warnings == []
    else:
        (text,) = warnings
        assert expected in text and "'impurity'" in text


def _recipes(path: Path, names, rows) -> Path:
    path.write_text("run_id," + ",".join(names) + "\n" + "".join(
        name + "," + ",".join(repr(float(v)) for v in x) + "\n" for name, x in rows), encoding="utf-8")
    return path


def test_judged_recipes_are_drawn_on_the_report_of_the_step_with_their_protocol_and_runs(tmp_path):
    from guardband.planner.report.folder import judged_recipes

    protocol, runs = PROTOCOLS / "tablet_blend.toml", PROTOCOLS / "tablet_blend_runs.csv"
    camp = tmp_path / "camp"
    _plan(protocol, runs, camp, "--count", "1", "--seed", "11")
    names = ["active", "mcc", "lactose", "croscarmellose", "povidone", "mg_stearate", "force"]
    mine = [("mine-A", [0.1, 0.45, 0.40, 0.03, 0.01, 0.01, 12.0]),
            ("mine-B", [0.1, 0.40, 0.40, 0.04, 0.04, 0.02, 9.5])]
    assert _invoke(["judge", protocol, runs, _recipes(tmp_path / "r.csv", names, mine), "--out", camp,
                    "--seed", "11"]).exit_code == 0
    # a judgement on other runs (one more run) belongs to no step of this folder
    more = tmp_path / "more.csv"
    more.write_text(runs.read_text(encoding="utf-8") + "R99,0.1,0.45,0.4,0.03,0.01,0.01,12,60,0.1,0.5,\n",
                    encoding="utf-8")
    assert _invoke(["judge", protocol, more, _recipes(tmp_path / "o.csv", names, [("other", mine[0][1])]),
                    "--out", camp, "--seed", "11"]).exit_code == 0
    records = ledger.read_records(camp / LOG_NAME)
    assert [r["kind"] for r in records] == ["plan", "judge", "judge"]
    shown = judged_recipes(records, records[0], names)
    assert [(r.name, r.record) for r in shown] == [("mine-A", 1), ("mine-B", 1)]
    # the amounts in the protocol's factor order (the log keeps JSON keys sorted)
    for r, (_, x) in zip(shown, mine):
        assert r.x.tolist() == x
    verdicts = {v["recipe"]: v["passes"] for v in records[1]["body"]["verdicts"]}
    assert [r.passes for r in shown] == [verdicts["mine-A"], verdicts["mine-B"]]
    result = _invoke(["report", camp])
    assert result.exit_code == 0, result.output
    label = records[0]["body"]["step_label"]
    page = (camp / f"report-{label}.html").read_text(encoding="utf-8")
    sections = _sections(page)
    assert "Green diamonds are recipes judged on this step's protocol and runs (judge record 1)" in \
        sections.joined("map")
    assert "judge record 2" not in page


def test_judged_recipes_change_the_map_and_the_slices(tablet_campaign):
    from guardband.planner.report.data import JudgedRecipe
    from guardband.planner.report.page import build_report

    rec = _only_plan(tablet_campaign)
    result, rec = rerun_record(tablet_campaign / LOG_NAME, rec["index"])
    from guardband.planner.report.folder import _recorded_runs

    runs = _recorded_runs(tablet_campaign, rec["body"], result.protocol)
    x = np.asarray(result.proposals[0].x, dtype=float).copy()
    x[-1] = 9.0  # force
    plain = build_report(result, runs, step_label="S")
    judged = build_report(result, runs, step_label="S", judged=[JudgedRecipe("mine", x, False, 3)])
    before = {f.name: f for f in plain.figures}
    after = {f.name: f for f in judged.figures}
    for name in ("map", "slices-1"):
        assert after[name].png != before[name].png and "Green diamonds" in after[name].caption
        assert "Green diamonds" not in before[name].caption
    assert after["history"].png == before["history"].png  # drawn only where recipes belong
