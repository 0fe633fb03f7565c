"""A chart of one account for ``ebbwatch explain --plot`` (matplotlib, an optional extra)."""

from __future__ import annotations

from datetime import date


def plot_account(info: dict, path: str):
    """Daily index (weekday factors not removed), the usual level, the recent window and the
    onset, written to ``path`` (.svg or .png)."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as exc:  # pragma: no cover - depends on the install
        from ..errors import UsageError

        raise UsageError("--plot needs matplotlib: pip install 'ebbwatch[plot]'") from exc
    days = [date.fromisoformat(d) for d in info["series"]["days"]]
    values = [float("nan") if v is None else v for v in info["series"]["index"]]
    fig, ax = plt.subplots(figsize=(8, 3), dpi=110)
    ax.plot(days, values, color="#1f4e79", linewidth=0.9, label="daily activity index")
    usual = info["recent"]["usual_level"]
    if usual is not None:
        ax.axhline(usual, color="#7f7f7f", linestyle="--", linewidth=1, label="usual level (median)")
    window = info["recent"]["window_days"]
    ax.axvspan(days[-window], days[-1], color="#d9a441", alpha=0.25, label=f"last {window} days")
    if info["changepoint"]["onset"]:
        ax.axvline(date.fromisoformat(info["changepoint"]["onset"]), color="#6a3d9a", linewidth=1.5,
                   linestyle=":", label="onset")
    ax.set_title(f"{info['name']} ({info['account']}) as of {info['as_of']}", fontsize=10)
    ax.legend(fontsize=7, loc="upper left")
    ax.tick_params(labelsize=7)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
