"""``calib demo`` (reduced scenario), then ``calib report`` and ``calib compare`` on its runs.

One reduced demo (:data:`calib.workflows.demo.QUICK_PLAN`, through the hidden ``--quick``) is
run once for the module: it is the whole chain, and its store holds a few small fitted runs,
approved, superseded and candidates, for the report and compare commands.
"""

from __future__ import annotations

import csv
import itertools
import json
import math
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import func, select
from typer.testing import CliRunner

from calib.cli import _register_all, app
from calib.errors import CalibrationInaccurateWarning
from calib.output.compare import csv_columns
from calib.output.report import FIGURES
from calib.store.engine import make_store
from calib.store.run_models import CalibrationRun, HistoricalEstimate, RunResidual
from calib.workflows import report as report_flow
from calib.workflows.demo import MARKER, QUICK_PLAN
from calib.workflows.demo.policies import POLICIES
from calib.workflows.report import ANCHOR_FACTORS, report_inputs
from tests.cli.test_store_cmds import run
from tests.output.test_report import _parse

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature, ISO/IEC 15948 section 5.2

pytestmark = pytest.mark.slow  # the module's demo takes about 15 s on this machine


@dataclass(frozen=True)
class Demo:
    folder: Path
    db_url: str
    summary: dict[str, Any]
    stdout: str
    stderr: str
    runs: list[dict[str, Any]]


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Demo:
    folder = tmp_path_factory.mktemp("demo") / "out"
    _register_all()
    result = CliRunner().invoke(app, ["demo", "--dir", str(folder), "--quick", "--json"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.stdout)
    db_url = summary["db_url"]
    runs = CliRunner().invoke(app, ["runs", "QLM", "--limit", "1000", "--json", "--db", db_url])
    assert runs.exit_code == 0, runs.output
    return Demo(folder, db_url, summary, result.stdout, result.stderr, json.loads(runs.stdout))


def _ever_approved(r: dict[str, Any]) -> bool:
    return any(e["to_status"] == "approved" for e in r["events"])


# --- the demo ----------------------------------------------------------------------------------


def test_demo_runs_the_whole_chain(demo: Demo) -> None:
    s = demo.summary
    engine = make_store(demo.db_url).engine
    with engine.connect() as conn:
        estimates = conn.execute(select(HistoricalEstimate.converged)).all()
        n_runs = conn.scalar(select(func.count()).select_from(CalibrationRun))
        n_residuals = conn.scalar(select(func.count()).select_from(RunResidual))
    engine.dispose()
    # one estimate, converged, close to the truth the data were simulated from: within four
    # standard errors for the volatilities and kappa (the drifts are poorly identified from
    # ten months of data, as their standard errors say)
    assert estimates == [(True,)] and s["estimate"]["converged"]
    for name in ("kappa", "sigma_spot", "sigma_yield", "rho"):
        se = s["estimate"]["std_errors"][name]
        assert abs(s["estimate"][name] - s["truth"][name]) < 4 * se, name
    # every morning of the last month was fitted and stored; some approved by the gates
    start, end = (QUICK_PLAN.spec.start.isoformat(), s["fit_window"][1])
    assert s["fit_window"][0] > s["estimate_window"][1] > start and end.startswith("2032-01")
    mornings = [r for r in demo.runs if r["study"] is None]
    assert len(mornings) == s["days_fitted"] + s["days_failed"] > 10
    assert s["days_failed"] == 0 and n_residuals and n_residuals >= 10 * n_runs
    # the policy comparison's study runs: one a day per policy, never approved
    studies = [r for r in demo.runs if r["study"] is not None]
    assert n_runs == len(mornings) + len(studies)
    assert {r["study"] for r in studies} == set(POLICIES) == {p["policy"] for p in s["policies"]}
    assert {r["status"] for r in studies} <= {"candidate", "rejected"}
    assert all(p["trades"] + p["not_sold"] >= 1 for p in s["policies"])
    assert Path(s["policy_page"]).is_file()
    approved = [r for r in mornings if _ever_approved(r)]
    assert len(approved) == s["days_approved"] > 0
    statuses = {r["status"] for r in mornings}
    assert "approved" in statuses and statuses <= {"approved", "superseded", "candidate"}
    # exactly one approved set is in force, the latest approval, and it is the reported run
    in_force = [r for r in mornings if r["status"] == "approved"]
    assert len(in_force) == 1 and in_force[0]["run_id"] == s["report_run_id"]
    # the files
    for key in ("report", "compare_csv", "compare_png"):
        assert Path(s[key]).is_file(), key
    assert Path(s["compare_png"]).read_bytes()[:8] == PNG_MAGIC
    with Path(s["compare_csv"]).open() as fh:
        assert len(list(csv.DictReader(fh))) == s["days_approved"]
    for kind in ("futures", "options", "rates"):
        assert Path(s["inputs"][kind]).stat().st_size > 0
    assert json.loads((demo.folder / "summary.json").read_text())["db_url"] == demo.db_url
    # progress on stderr, the result on stdout
    assert "ingested options" in demo.stderr and "morning 1/" in demo.stderr


def test_demo_refuses_a_store_it_did_not_make(
    demo: Demo, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    assert (demo.folder / MARKER).is_file()  # the demo's own folder: a rerun may replace it
    theirs = tmp_path / "theirs"
    theirs.mkdir()
    (theirs / "calib.sqlite").write_bytes(b"someone else's store")
    for fresh in ((), ("--fresh",)):  # --fresh never lets it delete what it did not write
        code, out, err = run(capsys, monkeypatch, "demo", "--dir", str(theirs), *fresh)
        assert code == 2 and out == "" and err.count("\n") == 1
        assert "is not empty and has no .calib-demo (it was not made by calib demo)" in err
        assert sorted(p.name for p in theirs.iterdir()) == ["calib.sqlite"]
        assert (theirs / "calib.sqlite").read_bytes() == b"someone else's store"


# --- report ------------------------------------------------------------------------------------


def test_a_solver_warning_reaches_the_user_as_one_plain_line(
    demo: Demo,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """A warning raised while the report re-solves the frontier is one line on stderr (no
    source line, no class path) and is shown on the page."""
    real = report_flow.frontier

    def inaccurate_frontier(*args: Any, **kwargs: Any) -> Any:
        warnings.warn(
            CalibrationInaccurateWarning(
                CalibrationInaccurateWarning.TEMPLATE.format(
                    solver="CLARABEL", status="optimal_inaccurate", iteration=2
                )
            ),
            stacklevel=1,
        )
        return real(*args, **kwargs)

    monkeypatch.setattr(report_flow, "frontier", inaccurate_frontier)
    fitted = next(r for r in demo.runs if r["status"] == "superseded")
    out_dir = tmp_path / "warned"
    args = ("report", str(fitted["run_id"]), "--out", str(out_dir), "--db", demo.db_url)
    code, _, err = run(capsys, monkeypatch, *args)
    line = "frontier: solver CLARABEL returned optimal_inaccurate at Gauss-Newton iteration 2"
    assert code == 0 and err.splitlines() == [f"warning: {line}"]
    assert line in " ".join(_parse(out_dir / "index.html").text)


def test_report_of_a_fitted_run(
    demo: Demo,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    superseded = next(r for r in demo.runs if r["status"] == "superseded")
    out_dir = tmp_path / "rep"
    args = ("report", str(superseded["run_id"]), "--out", str(out_dir), "--db", demo.db_url)
    code, out, _ = run(capsys, monkeypatch, *args, "--json")
    assert code == 0
    paths = json.loads(out)
    assert Path(paths["index"]) == out_dir / "index.html"
    assert sorted(paths["figures"]) == sorted(name for name, _ in FIGURES)
    for p in paths["figures"].values():
        assert Path(p).read_bytes()[:8] == PNG_MAGIC
    page = _parse(Path(paths["index"]))
    assert page.scripts == 0 and page.text.count("Approval gates") == 1
    assert sorted(page.imgs) == sorted(Path(p).name for p in paths["figures"].values())
    text = " ".join(page.text)
    assert f"run {superseded['run_id']}" in text and "superseded" in text
    assert "model-validation policy prevails" in text and "Quellium" in text

    # the joined quotes are the stored option rows of the run's residuals
    code, shown, _ = run(
        capsys, monkeypatch, "show", str(superseded["run_id"]), "--json", "--db", demo.db_url
    )
    stored = json.loads(shown)
    code, day, _ = run(
        capsys,
        monkeypatch,
        "quotes",
        "QLM",
        "--date",
        superseded["trade_date"],
        "--json",
        "--db",
        demo.db_url,
    )
    by_id = {o["row_id"]: o for o in json.loads(day)["options"]}
    inputs, weights = report_inputs(make_store(demo.db_url).sessions, superseded["run_id"])
    q = inputs.quotes
    assert [int(x) for x in q.label] == [r["quote_id"] for r in stored["residuals"]]
    for i, label in enumerate(q.label):
        o = by_id[int(label)]
        assert (q.strike[i], q.kind[i], q.expiry[i].isoformat()) == (
            o["strike"],
            o["kind"],
            o["expiry"],
        )
    assert list(q.market_vol) == [r["market_vol"] for r in stored["residuals"]]
    assert inputs.historical.sigma_yield == demo.summary["estimate"]["sigma_yield"]

    # the frontier: the run's own weight among them and reproducing the run's fit (same
    # quotes, estimate and settings), and a heavier anchor never moves sigma_yield further from
    # history (a penalty's solution path is monotone in its weight). Loosened from bit for bit
    # to 1e-5: the frontier re-solves one problem from weight to weight, so the iterations start
    # elsewhere and agree to the solver's convergence tolerance only.
    chosen = stored["settings"]["calibration"]["anchor_weight"]
    assert weights == tuple(sorted({chosen * f for f in ANCHOR_FACTORS}))
    own = next(p for p in inputs.frontier if p.anchor_weight == chosen)
    assert own.rmse == pytest.approx(stored["diagnostics"]["rmse"], rel=1e-5)
    distances = [p.distance for p in sorted(inputs.frontier, key=lambda p: p.anchor_weight)]
    assert all(b <= a * (1 + 1e-6) + 1e-12 for a, b in itertools.pairwise(distances))


def test_report_of_an_unknown_run_is_one_line(
    demo: Demo, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    code, _, err = run(
        capsys, monkeypatch, "report", "99999", "--out", str(tmp_path / "x"), "--db", demo.db_url
    )
    assert (
        code == 2 and err == "error: no calibration run 99999\n" and not (tmp_path / "x").exists()
    )


# --- compare -----------------------------------------------------------------------------------


def _rows(path: Path) -> list[dict[str, str]]:
    with path.open(newline="") as fh:
        reader = csv.DictReader(fh)
        assert tuple(reader.fieldnames or ()) == csv_columns()
        return list(reader)


def test_compare_selects_runs_and_flags_days_outside_the_band(
    demo: Demo, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    first, last = demo.summary["fit_window"]
    base = ("compare", "QLM", "--from", first, "--to", last, "--db", demo.db_url)
    code, out, _ = run(
        capsys,
        monkeypatch,
        *base,
        "--csv",
        str(tmp_path / "a.csv"),
        "--plot",
        str(tmp_path / "a.png"),
    )
    assert code == 0 and "runs ever approved" in out and "day(s) flagged" in out
    assert (tmp_path / "a.png").read_bytes()[:8] == PNG_MAGIC
    rows = _rows(tmp_path / "a.csv")
    # default: every run ever approved, superseded ones included, in trade-date order
    approved = sorted((r["trade_date"], r["run_id"]) for r in demo.runs if _ever_approved(r))
    assert [(r["trade_date"], int(r["run_id"])) for r in rows] == approved
    assert {r["status"] for r in rows} == {"approved", "superseded"}
    # the historical side is the estimate each run held fixed (the demo's only one)
    assert {float(r["sigma_spot_hist"]) for r in rows} == {demo.summary["estimate"]["sigma_spot"]}

    # --all: every fitted run; a band of [1, 1] on the spot ratio flags every day whose ratio
    # is not exactly one, recomputed here from the CSV's own columns
    code, out, _ = run(
        capsys,
        monkeypatch,
        *base,
        "--all",
        "--band-spot",
        "1,1",
        "--band-rho",
        "-1,1",
        "--csv",
        str(tmp_path / "b.csv"),
    )
    assert code == 0
    every = _rows(tmp_path / "b.csv")
    assert len(every) == len(demo.runs) > len(rows)
    for r in every:
        ratio = float(r["sigma_spot"]) / float(r["sigma_spot_hist"])
        assert math.isclose(float(r["sigma_spot_ratio"]), ratio, rel_tol=1e-15)
        assert r["sigma_spot_flag"] == ("0" if ratio == 1.0 else "1")
        diff = float(r["rho"]) - float(r["rho_hist"])
        assert r["rho_flag"] == ("1" if abs(diff) > 1.0 else "0")
    assert f"{len(every)} of {len(every)} day(s) flagged" in out

    # --fail-on-flag (issue 12: schedulers): exit 1 when a day is flagged, 0 when none is
    strict = ("--all", "--band-spot", "1,1", "--fail-on-flag")
    code, out, err = run(capsys, monkeypatch, *base, *strict)
    assert code == 1 and f"{len(every)} of {len(every)} day(s) flagged" in out
    assert f"{len(every)} day(s) flagged: exit 1" in err
    wide = ("--band-spot", "0,9", "--band-yield", "0,9", "--band-rho", "-2,2", "--fail-on-flag")
    code, out, _ = run(capsys, monkeypatch, *base, *wide)
    assert code == 0 and "0 of" in out

    code, out, _ = run(capsys, monkeypatch, *base, "--json", "--band-yield", "0.99,1.01")
    payload = json.loads(out)
    assert len(payload["rows"]) == len(rows) and payload["runs"] == "runs ever approved"
    # run ids are integers in every JSON output (issue 12, defect 5)
    assert [r["run_id"] for r in payload["rows"]] == [int(r["run_id"]) for r in rows]
    flagged = [r for r in payload["rows"] if "sigma_yield" in r["flags"]]
    for r in payload["rows"]:
        outside = not 0.99 <= r["sigma_yield"] / r["sigma_yield_hist"] <= 1.01
        assert outside == (r in flagged)


def test_compare_mistakes_are_one_line(
    demo: Demo, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    base = ("compare", "QLM", "--db", demo.db_url)
    code, _, err = run(
        capsys,
        monkeypatch,
        *base,
        "--from",
        "2031-12-01",
        "--to",
        "2032-02-01",
        "--band-spot",
        "1.2,0.8",
    )
    assert code == 2 and "--band-spot '1.2,0.8': need finite LO <= HI" in err
    code, _, err = run(capsys, monkeypatch, *base, "--from", "2020-01-01", "--to", "2020-02-01")
    assert code == 2 and "no calibration runs in the chosen dates" in err
    assert err.count("\n") == 1
