"""Fit report: page structure, figures, cautions, escaping, and a render in headless Chromium
(:mod:`tests.browser.harness`: skipped without the browser, failed under CI without it)."""

from __future__ import annotations

import dataclasses
import datetime as dt
import html
import re
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from calib.calibrate.result import BucketVols, ConstraintReport
from calib.errors import ReportInputError
from calib.model import black76, twofactor
from calib.model.twofactor import TwoFactorParams
from calib.output import report as rp
from tests.browser.harness import chromium_page, screenshot

TRADE = dt.date(2031, 3, 3)  # invented
HIST = TwoFactorParams(0.05, 1.2, 0.06, 0.02, 0.25, 0.20, 0.7)
CAL = HIST.with_vols(0.27, 0.19, 0.74)
HOSTILE = '<script>alert("x")</script>'
VOID = {"meta", "img", "br", "hr", "link", "input"}


def _inputs(rng: np.random.Generator, **over: object) -> rp.ReportInputs:
    """A run of 6 expiries x 9 strikes: model vols from CAL, market = model + smile + noise."""
    n_fut, n_exp, n_k = 10, 6, 9
    deliveries = tuple(
        dt.date(2031, 4 + m, 12) if m < 9 else dt.date(2032, m - 8, 12) for m in range(n_fut)
    )
    tau_f = np.array([(d - TRADE).days / 365.0 for d in deliveries])
    settle = twofactor.futures_price(2400.0, 0.01, tau_f, 0.03, CAL)
    expiries = tuple(d - dt.timedelta(days=5) for d in deliveries[:n_exp])
    j = np.repeat(np.arange(n_exp), n_k)  # contract of each quote
    t = np.array([(e - TRADE).days / 365.0 for e in expiries])[j]
    F, T = settle[j], tau_f[j]
    K = np.round(F * np.tile(np.linspace(0.8, 1.2, n_k), n_exp) / 25.0) * 25.0
    calls = K >= F  # out of the money
    model_vol = twofactor.implied_black_vol(t, T, CAL)
    m = np.log(K / F)
    market_vol = model_vol - 0.04 * m + 0.3 * m**2 + 0.002 * rng.standard_normal(K.size)
    kinds = tuple("call" if c else "put" for c in calls)
    quotes = rp.QuoteFits(
        label=tuple(
            f"{expiries[i]:%y%m} {k[0].upper()}{x:.0f}" for i, k, x in zip(j, kinds, K, strict=True)
        ),
        expiry=tuple(expiries[i] for i in j),
        delivery=tuple(deliveries[i] for i in j),
        kind=kinds,
        strike=K,
        t_expiry=t,
        market_vol=market_vol,
        model_vol=model_vol,
        market_price=black76.price(F, K, t, 0.03, market_vol, calls),
        model_price=black76.price(F, K, t, 0.03, model_vol, calls),
    )
    base: dict[str, object] = dict(
        commodity=rp.Commodity("QLM", "Quellium", "t", "NMD"),
        trade_date=TRADE,
        run=rp.RunInfo(
            "41",
            "candidate",
            dt.datetime(2031, 3, 4, 6, 15, tzinfo=dt.UTC),
            "quant.a",
            "0.1.0+g137abc5",
            ("b-17", "b-18"),
            "9f2c",
        ),
        params=CAL,
        historical=HIST,
        quotes=quotes,
        curve=rp.FuturesCurve(deliveries, tau_f, settle),
        solve=rp.SolveInfo("CLARABEL", "optimal", 4, True, 0.8, 2.1, "price"),
        constraints=(
            ConstraintReport("psd", "|rho| <= 1", None, 0.26, False, 0.0, None),
            ConstraintReport("decay_bound", "s2 <= rho kappa s1", None, 0.0, True, 3.2e-3, 1.1e-4),
        ),
        gates=(
            rp.GateRow("rmse_vol_points", 0.35, "<= 1.0", True),
            rp.GateRow("sigma_spot_ratio", 1.08, 1.25, True),
        ),
        dropped=(rp.DroppedRow("2603 C3000", "vega below min_vega"),),
        frontier=tuple(
            rp.FrontierRow(w, 0.05 / (1 + 1e4 * w), 0.6 + 40 * w, 0.1)
            for w in (0.0, 1e-5, 1e-4, 1e-3)
        ),
        settings={"mode": "constant", "anchor_weight": 1e-4, "moneyness_band": [0.5, 2.0]},
    )
    base.update(over)
    return rp.ReportInputs(**base)  # type: ignore[arg-type]


class _Page(HTMLParser):
    """Collects img sources, script tags and text; checks every element is closed in order."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.imgs: list[str] = []
        self.scripts = 0
        self.text: list[str] = []
        self.errors: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "img":
            self.imgs.append(dict(attrs)["src"] or "")
        if tag == "script":
            self.scripts += 1
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack.pop() != tag:
            self.errors.append(f"unbalanced </{tag}>")

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def _parse(path: Path) -> _Page:
    p = _Page()
    p.feed(path.read_text(encoding="utf-8"))
    p.close()
    assert not p.errors and not p.stack, (p.errors, p.stack)
    return p


@pytest.fixture(scope="module")
def rendered(tmp_path_factory: pytest.TempPathFactory) -> tuple[rp.ReportInputs, rp.ReportFiles]:
    inp = _inputs(np.random.default_rng(20310303))
    return inp, rp.render_report(inp, tmp_path_factory.mktemp("report") / "run41")


def test_page_parses_and_every_figure_is_a_png_beside_it(
    rendered: tuple[rp.ReportInputs, rp.ReportFiles],
) -> None:
    _, files = rendered
    page = _parse(files.index)
    assert set(files.figures) == {name for name, _ in rp.FIGURES}
    assert sorted(page.imgs) == sorted(p.name for p in files.figures.values())
    assert page.scripts == 0
    for src in page.imgs:
        path = files.index.parent / src  # relative, next to the page
        with Image.open(path) as img:
            assert img.format == "PNG" and min(img.size) > 100
            img.verify()


def test_cautions_and_headline_figures_are_on_the_page(
    rendered: tuple[rp.ReportInputs, rp.ReportFiles],
) -> None:
    inp, files = rendered
    text = " ".join(" ".join(_parse(files.index).text).split())
    for phrase in (
        "model risk",
        "Validate the parameters before use",
        "the firm's model-validation policy prevails",
        "the fit says how well the model reprices the quotes it saw, "
        "not that it prices other products right",
    ):
        assert phrase.lower() in text.lower()
    for phrase in ("Quellium (QLM)", "2031-03-03", "candidate", "run 41", "decay_bound"):
        assert phrase in text
    # Vol RMSE in vol points, recomputed here from the inputs (0.01 of vol = 1 point).
    q = inp.quotes
    vol_rmse = 100.0 * np.sqrt(np.mean((q.model_vol - q.market_vol) ** 2))
    assert re.search(rf"RMSE, vol\s*{vol_rmse:.3f}\s*vol points", text)


def test_hostile_text_is_escaped(tmp_path: Path, rng: np.random.Generator) -> None:
    inp = _inputs(
        rng,
        commodity=rp.Commodity("QLM", HOSTILE, "t&c", '"NMD"'),
        dropped=(rp.DroppedRow(HOSTILE, f"reason {HOSTILE}"),),
        gates=(rp.GateRow(HOSTILE, None, HOSTILE, False),),
        settings={HOSTILE: HOSTILE, "nested": {"k": HOSTILE}},
        frontier=(),
    )
    files = rp.render_report(inp, tmp_path)
    raw = files.index.read_text(encoding="utf-8")
    page = _parse(files.index)
    assert "<script" not in raw.lower() and page.scripts == 0
    assert html.escape(HOSTILE) in raw
    assert len(page.imgs) == len(files.figures) == len(rp.FIGURES) - 1  # no frontier given
    assert "frontier" not in files.figures


def test_forward_buckets_get_a_table_and_their_own_curves(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    buckets = (BucketVols(0.0, 0.3, CAL), BucketVols(0.3, 0.6, CAL.with_vols(0.24, 0.18, 0.7)))
    files = rp.render_report(_inputs(rng, buckets=buckets, frontier=()), tmp_path)
    text = " ".join(_parse(files.index).text)
    assert "Forward volatilities by calendar bucket" in text
    assert "0.3000" in text and "0.6000" in text


def test_inconsistent_inputs_are_errors_of_ours(rng: np.random.Generator) -> None:
    q = _inputs(rng).quotes
    with pytest.raises(ReportInputError, match=r"quotes\.strike has 3 entries"):
        dataclasses.replace(q, strike=q.strike[:3])
    with pytest.raises(ReportInputError, match="at least one fitted quote"):
        rp.QuoteFits((), (), (), (), *(np.empty(0),) * 6)
    with pytest.raises(ReportInputError, match="no contracts"):
        rp.FuturesCurve((), np.empty(0), np.empty(0))


def test_importing_the_modules_does_not_import_matplotlib() -> None:
    code = (
        "import sys, calib.output.report, calib.output.compare;"
        "sys.exit('matplotlib' in sys.modules)"
    )
    root = Path(__file__).resolve().parents[2]
    done = subprocess.run([sys.executable, "-c", code], cwd=root, env={"PYTHONPATH": str(root)})
    assert done.returncode == 0


# --- headless Chromium ---------------------------------------------------------------------------

_BROKEN_IMAGES = (
    "Array.from(document.images).filter(i => !(i.complete && i.naturalWidth > 0)).map(i => i.src)"
)


def test_page_loads_in_headless_chromium_with_every_figure(
    rendered: tuple[rp.ReportInputs, rp.ReportFiles], tmp_path: Path
) -> None:
    _, files = rendered
    with chromium_page() as page:
        problems: list[str] = []
        page.on("pageerror", lambda exc: problems.append(f"error: {exc}"))
        page.on("requestfailed", lambda req: problems.append(f"failed: {req.url}"))
        page.goto(files.index.as_uri(), wait_until="load")
        assert page.evaluate("document.images.length") == len(files.figures)
        assert page.evaluate(_BROKEN_IMAGES) == []
        assert problems == []
        assert page.locator("h1").inner_text().startswith("Fit report: Quellium (QLM)")
        screenshot(page, "fit-report")


def _page_text(inputs: rp.ReportInputs, folder: Path) -> str:
    files = rp.render_report(inputs, folder)
    return " ".join(" ".join(_parse(files.index).text).split())


def test_verdict_box_leads_with_the_failed_gates_and_flags(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    clean = _page_text(_inputs(rng, frontier=()), tmp_path / "clean")
    assert "Verdict: every gate passed (2), solver optimal." in clean
    gates = (rp.GateRow("rmse_vol", 1.4, "<= 1.0", False), rp.GateRow("decay_bound", 0.0, 0, True))
    solve = rp.SolveInfo(
        "CLARABEL", "optimal_inaccurate", 4, True, 0.8, 2.1, "price", ("inaccurate",)
    )
    text = _page_text(_inputs(rng, gates=gates, solve=solve, frontier=()), tmp_path / "bad")
    verdict = (
        "Verdict: not for automatic approval; failed gate: rmse_vol; caution flags: inaccurate."
    )
    assert verdict in text
    assert text.index("Verdict:") < text.index("Parameters against historical")


def test_title_names_a_commodity_once_when_it_has_no_long_name(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    text = _page_text(
        _inputs(rng, commodity=rp.Commodity("QLM", "QLM", "t", "NMD"), frontier=()), tmp_path
    )
    assert "Fit report: QLM, trade date" in text and "QLM (QLM)" not in text


def test_every_forward_bucket_and_the_previous_set_are_in_the_parameter_table(
    tmp_path: Path, rng: np.random.Generator
) -> None:
    buckets = tuple(
        BucketVols(0.3 * k, 0.3 * (k + 1), CAL.with_vols(0.2 + k / 100, 0.18, 0.7))
        for k in range(3)
    )
    previous = rp.PreviousSet(38, dt.date(2031, 3, 2), CAL.with_vols(0.25, 0.19, 0.66))
    inputs = _inputs(rng, buckets=buckets, previous=previous, frontier=())
    text = _page_text(inputs, tmp_path)
    for k, b in enumerate(buckets):
        for name in ("sigma_spot", "sigma_yield", "rho"):
            assert f"{name} bucket {k} [{b.start:.3g}, {b.end:.3g}) y" in text
    assert "previous approved (run 38)" in text and "calibrated vs previous" in text


def test_crowded_frontier_points_share_one_label() -> None:
    pts = [rp.FrontierRow(w, 0.05 / (1 + 1e4 * w), 0.6 + 40 * w, 0.1) for w in (0.0, 1e-9, 1e-2)]
    d = np.array([p.distance for p in pts])
    r = np.array([p.rmse for p in pts])
    assert [p.anchor_weight for p in rp._spaced(pts, d, r)] == [0.0, 1e-2]


def test_calls_and_puts_differ_in_colour_and_strikes_read_as_moneyness(
    rng: np.random.Generator,
) -> None:
    fig = rp._fig_smiles(_inputs(rng))
    ax = fig.axes[0]
    colours = {line.get_label(): line.get_color() for line in ax.get_lines()}
    assert colours["market call"] != colours["market put"]
    assert ax.child_axes, "a secondary strike axis in moneyness"
