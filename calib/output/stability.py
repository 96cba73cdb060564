"""What the stability view of a rolling series shows besides its text: the CSV of its windows
and the chart of each parameter over time.

Plain values in: the report's JSON object (:meth:`calib.workflows.stability.StabilityReport.
to_dict`, the stable keys of ``calib stability --json``), where a missing standard error or z
is ``null``; the files show it as NaN.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from calib.model.twofactor import PARAM_NAMES

CSV_COLUMNS = (
    "estimate_id",
    "window_start",
    "window_end",
    "converged",
    "in_use",
    *PARAM_NAMES,
    *(f"se_{n}" for n in PARAM_NAMES),
    *(f"z_{n}" for n in PARAM_NAMES),
    "decay_slack",
    "flags",
)
"""The columns of the CSV file, one row per window."""


def _real(value: float | None) -> float:
    return math.nan if value is None else float(value)


def write_csv(report: Mapping[str, Any], path: Path) -> Path:
    """One row per window (:data:`CSV_COLUMNS`); flags joined by ``;``."""
    with Path(path).open("w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow(CSV_COLUMNS)
        for w in report["windows"]:
            out.writerow(
                [
                    w["estimate_id"],
                    w["window_start"],
                    w["window_end"],
                    w["converged"],
                    w["in_use"],
                    *(repr(_real(w[n])) for n in PARAM_NAMES),
                    *(repr(_real(w["std_errors"][n])) for n in PARAM_NAMES),
                    *(repr(_real(w["z"][n])) for n in PARAM_NAMES),
                    repr(_real(w["decay_slack"])),
                    ";".join(w["flags"]),
                ]
            )
    return Path(path)


def write_png(report: Mapping[str, Any], path: Path) -> Path:
    """One panel per parameter: the window estimates over their ends with the +-2 s.e. band,
    the estimate in use as a horizontal line with its own band, flagged windows marked."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    windows = report["windows"]
    series, use = report["series"], report["in_use"]

    ends = np.array([w["window_end"] for w in windows], dtype="datetime64[D]")
    flagged = np.array([bool(w["flags"]) for w in windows])
    fig, axes = plt.subplots(len(PARAM_NAMES), 1, figsize=(9, 2.0 * len(PARAM_NAMES)), sharex=True)
    for ax, name in zip(axes, PARAM_NAMES, strict=True):
        v = np.array([_real(w[name]) for w in windows])
        s = np.array([_real(w["std_errors"][name]) for w in windows])
        ax.fill_between(ends, v - 2 * s, v + 2 * s, color="#9ecae1", alpha=0.6, label="±2 s.e.")
        ax.plot(ends, v, color="#08519c", lw=1.2, label="window estimate")
        ref = use[name]
        ref_se = use["std_errors"].get(name)
        ax.axhline(ref, color="#a63603", lw=1.0, label=f"in use (estimate {use['estimate_id']})")
        if ref_se is not None:
            ax.axhspan(ref - 2 * ref_se, ref + 2 * ref_se, color="#fdae6b", alpha=0.2)
        mine = np.array([name in w["flags"] for w in windows])
        ax.plot(ends[mine], v[mine], "v", color="#cb181d", ms=5, label=f"> {report['k']:g} s.e.")
        ax.set_ylabel(name)
        ax.grid(alpha=0.3)
    if flagged.any():
        for ax in axes:
            for d in ends[flagged & np.array(["decay_bound" in w["flags"] for w in windows])]:
                ax.axvline(d, color="#756bb1", lw=0.6, ls=":")
    axes[0].legend(loc="upper left", fontsize=7, ncol=4)
    axes[0].set_title(
        f"{series['commodity']}: rolling {series['window_length']} windows every "
        f"{series['step']} (series {series['series_id']}); dotted: decay bound fails"
    )
    axes[-1].set_xlabel("window end")
    fig.text(0.01, 0.005, report["recommendation"], fontsize=7)
    fig.tight_layout(rect=(0, 0.02, 1, 1))
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return Path(path)
