"""Pictures of fitted smiles: per expiry the market bid/ask vols as bars, the mid vols and
the fitted SVI smile, arbitrage marked; and a panel of the at-the-money term structure.

matplotlib is an optional extra (``pip install 'volsweep[plot]'``), imported only here.
"""

from __future__ import annotations

import math
import os
import tempfile

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

PLOT_EXTRA = "pip install 'volsweep[plot]'"


class PlotUnavailable(ImportError):
    """matplotlib is not installed."""


def _pyplot():
    try:
        import matplotlib
    except ImportError:
        raise PlotUnavailable(f"pictures need matplotlib, which is not installed: "
                              f"{PLOT_EXTRA}") from None
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    return plt


def _svi_vol(k, r):
    x = k - r["svi_m"]
    w = r["svi_a"] + r["svi_b"] * (r["svi_rho"] * x + np.sqrt(x * x + r["svi_sigma"] ** 2))
    with np.errstate(invalid="ignore"):
        return np.sqrt(np.where(w > 0, w, np.nan) / r["expiry_years"])


def draw_smiles(quotes: pa.Table, smiles: pa.Table, path: str, *, title: str = "",
                time_key: str = "expiry_years", max_expiries: int = 24) -> str:
    """Draw the fitted ``smiles`` (one surface's rows of ``fit_smiles``; the first
    ``max_expiries`` with status ok, a panel each) over ``quotes`` (its rows,
    with ``strike``, ``iv`` and optionally ``iv_bid``/``iv_ask`` and ``status``, and the
    slice key ``time_key``) into the image file ``path`` (format from its name; written to
    a temporary file and renamed).  Returns ``path``."""
    plt = _pyplot()
    every = smiles
    smiles = smiles.filter(pc.equal(smiles.column("status"), "ok"))
    n = min(smiles.num_rows, max_expiries)
    ncols = min(4, n + 1)
    nrows = math.ceil((n + 1) / ncols)
    fig, axes = plt.subplots(nrows, ncols, figsize=(3.1 * ncols, 2.5 * nrows),
                             squeeze=False)
    flat = axes.ravel()
    keys = smiles.column(time_key).to_pylist()
    qkey = quotes.column(time_key)
    if pa.types.is_dictionary(qkey.type):
        qkey = qkey.cast(qkey.type.value_type)
    rows = smiles.to_pylist()
    have_spread = "iv_bid" in quotes.column_names and "iv_ask" in quotes.column_names
    for i in range(n):
        ax = flat[i]
        r = rows[i]
        q = quotes.filter(pc.equal(qkey, pa.scalar(keys[i], qkey.type)))
        if "status" in q.column_names:
            q = q.filter(pc.fill_null(pc.equal(q.column("status"), "ok"), False))
        label = f"{r['expiry_years']:.3f} y" if r["expiry_years"] is not None else str(keys[i])
        if r["status"] != "ok" or r["forward"] is None:
            ax.set_title(f"{label}: {r['status']}", fontsize=8)
            ax.axis("off")
            continue
        k = np.log(np.asarray(q.column("strike").to_numpy(zero_copy_only=False), float)
                   / r["forward"])
        if have_spread:
            lo = np.asarray(q.column("iv_bid").to_numpy(zero_copy_only=False), float)
            hi = np.asarray(q.column("iv_ask").to_numpy(zero_copy_only=False), float)
            both = np.isfinite(lo) & np.isfinite(hi)
            ax.vlines(k[both], lo[both], hi[both], color="0.65", lw=1.2,
                      label="bid/ask vols")
        mid = np.asarray(q.column("iv").to_numpy(zero_copy_only=False), float)
        ax.plot(k, mid, ".", ms=2.5, color="tab:blue", label="mid vols")
        span = (np.nanmin(k), np.nanmax(k)) if k.size else (-0.5, 0.5)
        kk = np.linspace(span[0], span[1], 200)
        ax.plot(kk, _svi_vol(kk, r), color="tab:orange", lw=1.3, label="SVI fit")
        flags = []
        if r["butterfly_arbitrage"]:
            flags.append("butterfly")
            if r["durrleman_min_k"] is not None:
                ax.axvline(r["durrleman_min_k"], color="tab:red", lw=0.8, ls="--")
        if r["calendar_arbitrage"]:
            flags.append("calendar")
        ax.set_title(f"{label}, rmse {100 * r['rmse_iv']:.2f} pts"
                     + (f"  [{' + '.join(flags)} arbitrage]" if flags else ""),
                     fontsize=8, color="tab:red" if flags else "black")
        finite = mid[np.isfinite(mid)]
        if finite.size:
            top = np.percentile(finite, 98) * 1.3
            ax.set_ylim(max(0.0, np.percentile(finite, 1) * 0.7), top)
        ax.tick_params(labelsize=7)
        if i == 0:
            ax.legend(fontsize=6, loc="upper right")
        if i % ncols == 0:
            ax.set_ylabel("implied vol", fontsize=7)
        ax.set_xlabel("ln(K/F)", fontsize=7)
    # the at-the-money term structure
    ax = flat[n]
    ok = rows                                               # every fitted expiry
    t = [r["expiry_years"] for r in ok]
    ax.plot(t, [r["atm_vol"] for r in ok], "o-", ms=3, color="tab:orange", label="ATM vol")
    bad = [r for r in ok if r["butterfly_arbitrage"] or r["calendar_arbitrage"]]
    if bad:
        ax.plot([r["expiry_years"] for r in bad], [r["atm_vol"] for r in bad], "x",
                color="tab:red", ms=6, label="arbitrage flagged")
    ax.set_xscale("log" if t and min(t) > 0 else "linear")
    ax.set_title("ATM term structure", fontsize=8)
    ax.set_xlabel("years to expiry", fontsize=7)
    ax.tick_params(labelsize=7)
    ax.legend(fontsize=6)
    for ax in flat[n + 1:]:
        ax.axis("off")
    unfitted = every.num_rows - smiles.num_rows
    if unfitted:
        title = (title + "; " if title else "") + f"{unfitted} expiries without a fit"
    if title:
        fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    folder = os.path.dirname(os.path.abspath(path))
    suffix = os.path.splitext(path)[1] or ".png"
    fd, tmp = tempfile.mkstemp(prefix=".smile-", suffix=suffix, dir=folder)
    os.close(fd)
    try:
        fig.savefig(tmp, dpi=80)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise
    finally:
        plt.close(fig)
    return path
