"""A chart of one account for ``ebbwatch explain --plot`` (matplotlib, an optional extra)."""

from __future__ import annotations

from datetime import date


def require_matplotlib():
    """matplotlib's pyplot (Agg), or the usage error that says how to install it; called before
    any long work whose result is to be plotted."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as exc:
        from ..errors import UsageError

        raise UsageError("--plot needs matplotlib: pip install 'ebbwatch[plot]'") from exc
    return plt


def plot_account(info: dict, path: str):
    """Daily index (weekday factors not removed), the usual level, the recent window, the
    segments of the whole history and the onset, written to ``path`` (.svg or .png)."""
    plt = require_matplotlib()
    days = [date.fromisoformat(d) for d in info["series"]["days"]]
    values = [float("nan") if v is None else v for v in info["series"]["index"]]
    fig, ax = plt.subplots(figsize=(8, 3), dpi=110)
    ax.plot(days, values, color="#1f4e79", linewidth=0.9, label="daily activity index")
    usual = info["recent"]["usual_level"]
    if usual is not None:
        ax.axhline(usual, color="#7f7f7f", linestyle="--", linewidth=1, label="usual level (median)")
    window = info["recent"]["window_days"]
    ax.axvspan(days[-window], days[-1], color="#d9a441", alpha=0.25, label=f"last {window} days")
    for i, segment in enumerate(info.get("segments", [])):
        if segment["level"] is not None:
            ax.hlines(segment["level"], date.fromisoformat(segment["start"]), date.fromisoformat(segment["end"]),
                      color="#b2182b", linewidth=1.6, label="segments (weekday-adjusted level)" if i == 0 else None)
    if info["changepoint"]["onset"]:
        ax.axvline(date.fromisoformat(info["changepoint"]["onset"]), color="#6a3d9a", linewidth=1.5,
                   linestyle=":", label="onset")
    ax.set_title(f"{info['name']} ({info['account']}) as of {info['as_of']}", fontsize=10)
    ax.legend(fontsize=7, loc="upper left")
    ax.tick_params(labelsize=7)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


def plot_backtest(result: dict, lead_times: list, path: str):
    """Precision against recall over the severity sweep, and the lead-time distribution."""
    plt = require_matplotlib()

    fig, (left, right) = plt.subplots(1, 2, figsize=(9, 3.4), dpi=110)
    markers = {"churned": "o", "contracted": "s", "expanded": "^"}
    for kind in result["outcomes"]:
        points = [(m["outcomes"][kind]["recall_at_lead"], m["outcomes"][kind]["precision"]) for m in result["sweep"]
                  if m["outcomes"].get(kind, {}).get("precision") is not None]
        if points:
            left.plot([p[0] for p in points], [p[1] for p in points], marker=markers.get(kind, "x"), label=kind)
    left.set_xlabel("recall at lead", fontsize=8)
    left.set_ylabel("precision", fontsize=8)
    left.set_xlim(0, 1.02)
    left.set_ylim(0, 1.02)
    left.legend(fontsize=7)
    left.set_title("severity sweep", fontsize=9)
    right.hist(lead_times, bins=range(0, result["horizon_days"] + 8, 7), color="#1f4e79")
    right.axvline(result["lead_days"], color="#d9a441", linestyle="--", label=f"lead {result['lead_days']} d")
    right.set_xlabel("days from first alert to outcome", fontsize=8)
    right.set_title("lead times", fontsize=9)
    right.legend(fontsize=7)
    for ax in (left, right):
        ax.tick_params(labelsize=7)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
