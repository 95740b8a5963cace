"""P&L heat maps of a scenario grid (``volsweep.scenarios``): one picture per group, spot
shocks across, vol shocks up.  Needs matplotlib (the ``plot`` extra).

``python -m volsweep.plot_risk OUT.png`` draws the README's picture from demo data: a
seeded book of positions on one fictional underlying of the demo venue.
"""

from __future__ import annotations

import os
import re
import sys

import numpy as np
import pyarrow as pa

INSTALL_HINT = "the heat map needs matplotlib: pip install 'volsweep[plot]'"


def _pyplot():
    try:
        import matplotlib
    except ImportError:
        raise ImportError(INSTALL_HINT) from None
    matplotlib.use("Agg")            # files only, never a window
    import matplotlib.pyplot as plt

    return plt


def _label(values) -> str:
    return " ".join("(null)" if v is None else str(v) for v in values)


def file_name(values) -> str:
    """A file name for a group's picture from its key values (``risk_<keys>.png``)."""
    text = "_".join("null" if v is None else str(v) for v in values) or "all"
    return "risk_" + re.sub(r"[^A-Za-z0-9._-]+", "-", text)[:120] + ".png"


def draw(path: str, spot: np.ndarray, vol: np.ndarray, pnl: np.ndarray, title: str,
         vol_unit: str = "vol points") -> None:
    """One heat map: ``pnl[i, j]`` at ``spot[i]``, ``vol[j]`` (shocks in the grid's
    order; null cells grey)."""
    plt = _pyplot()
    from matplotlib.colors import TwoSlopeNorm

    grid = np.ma.masked_invalid(np.asarray(pnl, np.float64).T)     # rows: vol shocks
    span = float(np.nanmax(np.abs(pnl))) if np.isfinite(pnl).any() else 1.0
    span = span or 1.0
    fig, ax = plt.subplots(figsize=(7.0, 3.4), dpi=90)
    cmap = plt.get_cmap("RdYlGn").with_extremes(bad="0.8")
    im = ax.imshow(grid, origin="lower", aspect="auto", cmap=cmap,
                   norm=TwoSlopeNorm(vcenter=0.0, vmin=-span, vmax=span))
    step = max(1, -(-len(spot) // 11))          # at most 11 labels
    ax.set_xticks(range(0, len(spot), step))
    ax.set_xticklabels([f"{100 * s:+.0f}%" if abs(100 * s - round(100 * s)) < 1e-9
                        else f"{100 * s:+.1f}%" for s in spot[::step]], fontsize=8)
    ax.set_yticks(range(len(vol)))
    scale = 100.0 if vol_unit == "vol points" else 1.0
    ax.set_yticklabels([f"{scale * v:+g}" for v in vol], fontsize=8)
    ax.set_xlabel("spot shock (relative)")
    ax.set_ylabel(f"vol shock ({vol_unit})")
    ax.set_title(title, fontsize=10)
    bar = fig.colorbar(im, ax=ax)
    bar.set_label("P&L (currency)")
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)


def write_heatmaps(table: pa.Table, by, folder: str, *, model: str = "", days=0.0) -> list:
    """One PNG per group of a ``scenarios`` table in ``folder`` (created if missing);
    returns the paths, in the table's group order."""
    _pyplot()
    os.makedirs(folder, exist_ok=True)
    from volsweep.kernel import registry

    normal = model and registry.model(model).vol == "normal"
    spot = np.unique(table["spot_shock"].to_numpy())
    vol = np.unique(table["vol_shock"].to_numpy())
    keys = list(zip(*(table[c].to_pylist() for c in by))) if by else \
        [()] * table.num_rows
    groups = list(dict.fromkeys(keys))
    paths, taken = [], set()
    pnl_all = table["pnl"].to_numpy(zero_copy_only=False)
    s_all = table["spot_shock"].to_numpy()
    v_all = table["vol_shock"].to_numpy()
    key_index = {k: i for i, k in enumerate(groups)}
    member = np.array([key_index[k] for k in keys], np.int64)
    for gi, key in enumerate(groups):
        sel = member == gi
        grid = np.full((len(spot), len(vol)), np.nan)
        grid[np.searchsorted(spot, s_all[sel]), np.searchsorted(vol, v_all[sel])] = \
            pnl_all[sel]
        name = file_name(key)
        if name in taken:
            name = name[:-4] + f"-{gi}.png"
        taken.add(name)
        path = os.path.join(folder, name)
        shift = f", {days:g} days on" if days else ""
        title = (f"P&L of {_label(key) or 'the book'} by full revaluation"
                 f"{' (' + model + shift + ')' if model else ''}")
        draw(path, spot, vol, grid, title,
             "normal vol, price units" if normal else "vol points")
        paths.append(path)
    return paths


def demo_book(n_rows: int = 40_000, seed: int = 7) -> tuple:
    """(book, underlying): a seeded book of positions on the demo snapshot's most listed
    fictional underlying (quantities and multipliers invented here)."""
    import pyarrow.compute as pc

    from volsweep.data_gen import make_snapshot

    snap = make_snapshot(n_rows=n_rows, seed=seed, bad_fraction=0.0)
    und = pc.value_counts(snap["underlying"].cast(pa.string())).to_pylist()
    name = max(und, key=lambda r: (r["counts"], r["values"]))["values"]
    book = snap.filter(pc.equal(snap["underlying"].cast(pa.string()), name))
    rng = np.random.default_rng(seed)
    n = book.num_rows
    # a short-vol book: sold options near the money, a few long wings
    k = np.log(book["strike"].to_numpy() / book["forward"].to_numpy())
    qty = np.where(np.abs(k) < 0.15, -rng.integers(10, 60, n), rng.integers(0, 6, n))
    book = book.append_column("quantity", pa.array(qty.astype(np.float64)))
    book = book.append_column("multiplier", pa.array(np.full(n, 100.0)))
    return book, name


def main(argv=None) -> int:
    import volsweep

    args = sys.argv[1:] if argv is None else argv
    if len(args) != 1:
        print("usage: python -m volsweep.plot_risk OUT.png", file=sys.stderr)
        return 2
    book, name = demo_book()
    grid = volsweep.scenarios(book, columns={"vol": "true_vol"})
    sub = grid                     # one group: the book holds one underlying
    spot = np.unique(sub["spot_shock"].to_numpy())
    vol = np.unique(sub["vol_shock"].to_numpy())
    pnl = sub["pnl"].to_numpy(zero_copy_only=False).reshape(len(spot), len(vol))
    draw(args[0], spot, vol, pnl,
         f"P&L of a demo book on {name} (HBOX, fictional), full revaluation")
    print(f"{args[0]}: {book.num_rows:,d} positions on {name}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
