"""The curve-move gate in the morning run: a day whose futures curve jumped against the
previous stored day (a settle typed x10 that the ingest band let through) is not approved by
``--auto-approve``, and ``calib show`` says why."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest

from calib.cli.run_cmds import show_cmd
from calib.inputs.rules import Bands
from calib.policy.settings import RunSettings
from calib.store.engine import Store
from calib.workflows.fit import fit_day
from calib.workflows.ingest import ingest_file
from tests.workflows.small_day import load_with_estimate

HELD = RunSettings.from_dict(
    {"gates": {"max_rmse_vol_points": 100.0, "max_error_vol_points": 100.0}}
)
"""Loose fit gates: this test is about the curve, not the fit's accuracy."""


def test_a_curve_that_jumped_is_held_for_review(
    store: Store, db_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    loaded = load_with_estimate(store, tmp_path)
    last, before = loaded.days[-1], loaded.days[-2]
    rows = (tmp_path / "futures.csv").read_text().splitlines()
    settle = {(r.split(",")[0], r.split(",")[2]): float(r.split(",")[3]) for r in rows[1:]}
    delivery = max(d for t, d in settle if t == last.isoformat())  # no option on it
    typo = 10.0 * settle[(last.isoformat(), delivery)]
    fixed = tmp_path / "typo.csv"
    fixed.write_text(f"{rows[0]}\n{last},{loaded.code},{delivery},{typo!r}\n")

    clean = fit_day(store.sessions, loaded.code, last, by="q", settings=HELD, auto_approve=False)
    gate = {g.name: g for g in clean.gates}["curve_move"]
    assert gate.passed and isinstance(gate.value, float) and 0.0 < gate.value < 0.2, gate
    assert before.isoformat() in gate.detail

    ingest_file(store.sessions, fixed, "futures", by="t", bands=Bands(settle_move=20.0))
    jumped = fit_day(store.sessions, loaded.code, last, by="q", settings=HELD, auto_approve=True)
    gates = {g.name: g for g in jumped.gates}
    expected = abs(math.log(typo / settle[(before.isoformat(), delivery)]))
    assert gates["curve_move"].value == pytest.approx(expected, rel=1e-12)
    assert not gates["curve_move"].passed and delivery in gates["curve_move"].detail
    assert [n for n, g in gates.items() if not g.passed] == ["curve_move"]
    assert not jumped.auto_approved and jumped.run.status == "candidate"

    show_cmd(jumped.run.run_id, db=db_url, as_json=True)  # what `calib show RUN --json` prints
    out = capsys.readouterr().out
    shown = json.loads(out)
    (stored,) = [g for g in shown["diagnostics"]["gates"] if g["name"] == "curve_move"]
    assert stored["passed"] is False and stored["value"] == pytest.approx(expected, rel=1e-12)
