"""Learning curves: bits per byte against time, drawn to a PNG (matplotlib, optional)."""
from __future__ import annotations

import os

from ..errors import raise_pending


def write_curve_png(curve: list, path: str, title: str) -> str | None:
    """Train and validation bits per byte against time; None when matplotlib is missing."""
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return None
    fig, ax = plt.subplots(figsize=(7, 4), dpi=100)
    t = [c["seconds"] for c in curve]
    if all("train_bpb" in c for c in curve):
        ax.plot(t, [c["train_bpb"] for c in curve], label="train (running mean)", color="#3b6ea8")
    ax.plot(t, [c["val_bpb"] for c in curve], label="validation", color="#c8553d", marker="o", ms=3)
    ax.set_xlabel("seconds")
    ax.set_ylabel("bits per byte")
    ax.set_title(title)
    ax.grid(alpha=0.3)
    ax.legend()
    fig.tight_layout()
    tmp = path + ".part"
    try:
        fig.savefig(tmp, format="png")
        raise_pending()  # a signal whose exception was lost (errors.raise_pending): no final name
        os.replace(tmp, path)
    except BaseException:  # an interrupt or a full disk: no temporary file left behind
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    finally:
        plt.close(fig)
    return path
