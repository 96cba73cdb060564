"""The policy comparison's printers and page (calib.output.hedge), from plain rows: the table,
the CSV, and the page with its figure in headless Chromium."""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

import numpy as np

from calib.output.hedge import CSV_KEYS, policy_lines, render_policy_page, write_policy_csv
from tests.browser.harness import chromium_page, screenshot


def _row(policy: str, pnl: list[float | None], rng: np.random.Generator) -> dict[str, Any]:
    sold = [p for p in pnl if p is not None]
    trades = [
        {
            "start": f"2031-03-{i + 2:02d}",
            "premium": None if p is None else 1.0,
            "pnl": None if p is None else p / 100.0,
            "pnl_pct": p,
            "hedge_error_rms": None if p is None else float(rng.uniform(0.01, 0.1)),
            "carried_days": 0,
            "not_sold": "no study run of this policy with every gate passed yet"
            if p is None
            else None,
        }
        for i, p in enumerate(pnl)
    ]
    return {
        "commodity": "QLM",
        "policy": policy,
        "settings_file": f"{policy}.toml",
        "settings_sha256": "0" * 64,
        "trades": len(sold),
        "not_sold": len(pnl) - len(sold),
        "mean_pct": float(np.mean(sold)) if sold else None,
        "sd_pct": float(np.std(sold, ddof=1)) if len(sold) > 1 else None,
        "worst_pct": min(sold) if sold else None,
        "q5_pct": float(np.quantile(sold, 0.05)) if sold else None,
        "hedge_error_rms": 0.05,
        "fit_rmse_vol_points": 0.9,
        "gate_failed_share": 0.25,
        "days": 20,
        "gate_failed_days": 5,
        "fitted": 20,
        "fit_failed": 0,
        "no_quotes": 0,
        "skipped": 0,
        "trade_list": trades,
    }


def test_table_csv_and_page_in_headless_chromium(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    rows = [
        _row("free", [-40.0, 12.0, None, -3.5], rng),
        _row("floor-100", [-2.0, 1.5, 0.5, -1.0], rng),
        _row("empty", [None], rng),  # nothing sold: every statistic unknown
    ]
    lines = policy_lines(rows)
    assert lines[0].split()[:3] == ["commodity", "policy", "trades"]
    assert lines[3].split()[1:4] == ["empty", "0", "-"]
    assert any("not sold on 2031-03-04" in line for line in lines)
    with write_policy_csv(rows, tmp_path / "p.csv").open(encoding="utf-8") as fh:
        table = list(csv.reader(fh))
    assert table[0] == list(CSV_KEYS) and len(table) == 4
    assert table[3][CSV_KEYS.index("mean_pct")] == ""  # unknown, not "None" or "nan"

    index, figure = render_policy_page(rows, "QLM spread call, test", tmp_path / "page")
    assert figure.read_bytes()[:4] == b"\x89PNG"
    with chromium_page() as page:
        problems: list[str] = []
        page.on("pageerror", lambda exc: problems.append(f"error: {exc}"))
        page.on("requestfailed", lambda req: problems.append(f"failed: {req.url}"))
        page.goto(index.as_uri(), wait_until="load")
        assert problems == []
        assert page.evaluate("document.getElementById('figure').naturalWidth") > 0
        cells = page.locator("#policies tbody tr").all_inner_texts()
        assert len(cells) == 3 and cells[0].split("\t")[1] == "free"
        assert "one path" in page.locator(".caution").inner_text()
        screenshot(page, "hedge-policies")
