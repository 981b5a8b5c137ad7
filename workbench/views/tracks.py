"""Static figure of tracked shares: each piece's share of the balanced height anomaly over time
(the table of :func:`workbench.tracking.tracked_shares`). Draws only; computes no physics."""
from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from workbench.errors import InputError
from workbench.export import CAUTION

__all__ = ["tracked_shares_figure"]

_MARKERS = {"start": "o", "tracked": "o", "fixed": "s", "split": "v", "merged": "^", "split+merged": "D"}


def tracked_shares_figure(table, pieces=None, title=None, column="height_share_pct") -> Figure:
    """A line per piece of ``column`` (default the height share, %) against valid time.

    ``pieces``: names to draw (default: every piece of the table but the remainder);
    split / merge are marked (triangles down / up), a lost piece's line stops and the time it
    was lost is marked with a cross on the time axis. The caution line is printed below."""
    need = {"time", "piece", "status", column}
    if not need <= set(table.columns):
        raise InputError(f"tracked-shares table lacks {', '.join(sorted(need - set(table.columns)))}; "
                         "make it with workbench.tracking.tracked_shares")
    names = list(dict.fromkeys(table["piece"])) if pieces is None else list(pieces)
    if pieces is None:
        names = [n for n in names if n != "remainder"]
    unknown = [n for n in names if n not in set(table["piece"])]
    if unknown:
        raise InputError(f"no piece {', '.join(map(repr, unknown))} in the tracked-shares table")
    times = list(dict.fromkeys(table["time"]))
    x = {t: k for k, t in enumerate(times)}
    fig = Figure(figsize=(10, 5.5), dpi=120)
    ax = fig.add_axes([0.08, 0.2, 0.6, 0.68])
    for k, name in enumerate(names):
        rows = table[table["piece"] == name]
        xs = np.array([x[t] for t in rows["time"]])
        ys = rows[column].to_numpy(dtype=float)
        follow = rows["follow"].iloc[0] if "follow" in rows else "fixed"
        label = f"{name} ({'follows its anomaly' if follow == 'anomaly' else 'fixed outline'})"
        line, = ax.plot(xs, ys, "-" if follow == "anomaly" else "--", lw=1.8, label=label)
        for xi, yi, st in zip(xs, ys, rows["status"]):
            if np.isfinite(yi):
                ax.plot([xi], [yi], _MARKERS.get(st, "o"), color=line.get_color(),
                        ms=7 if st in ("split", "merged", "split+merged") else 4)
            elif st == "lost":
                ax.plot([xi], [0.0], "x", color=line.get_color(), ms=10, mew=2)
    ax.axhline(0.0, color="#888888", lw=0.6)
    ax.set_xticks(range(len(times)))
    ax.set_xticklabels([str(t)[5:16].replace("T", " ") for t in times], rotation=60, ha="right", fontsize=7)
    ax.set_ylabel({"height_share_pct": "share of the balanced height anomaly (%)",
                   "vorticity_share_pct": "share of the balanced relative vorticity (%)"}.get(column, column))
    ax.grid(alpha=0.3)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, frameon=False)
    fig.text(0.7, 0.45, "markers: o tracked, \u25bc split, \u25b2 merged,\n\u00d7 lost (no share)",
             fontsize=7.5, va="top")
    tgt = table.attrs.get("target")
    fig.text(0.08, 0.94, title or "Shares over time of pieces carried through the case", fontsize=12,
             fontweight="bold", usetex=False)
    fig.text(0.08, 0.905, f"target: {tgt or 'storm centre'}; reference: {table.attrs.get('reference', '')}",
             fontsize=8.5)
    fig.text(0.5, 0.02, CAUTION, ha="center", fontsize=6.5, wrap=True)
    return fig
