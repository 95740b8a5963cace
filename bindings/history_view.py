"""The research view over backfilled chain results: constant-maturity vols per day.

``term_history`` reads the partitions a ``backfill(..., operation="variance")`` (and,
optionally, ``operation="smiles"``) wrote, with their partition keys (``date=...``
folders become a ``date`` column), and interpolates, per partition and underlying, the
model-free variance and the ATM total variance to fixed horizons, linear in total
variance between the bracketing expiries (``constant_maturity_variance``).  One table
for the whole history, ordered by partition keys, then ``by``, then horizon.

``draw`` (matplotlib, the ``plot`` extra) pictures it for a few underlyings.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

INSTALL_HINT = "the history picture needs matplotlib: pip install 'volsweep[plot]'"


def _read_dataset(root, what: str):
    """(table, partition key names) of a backfilled dataset folder (hive partitions)."""
    import os

    import pyarrow.dataset as ds

    root = os.fspath(root)
    if not os.path.isdir(root):
        raise ValueError(f"{what}: {root!r} is not a dataset folder")
    dataset = ds.dataset(root, format="parquet", partitioning="hive")
    keys = [f.name for f in dataset.partitioning.schema] if dataset.partitioning else []
    return dataset.to_table(), keys


def _cm(table: pa.Table, keys, by, days, variance: pa.Array, status, prefix: str):
    from .chains import constant_maturity_variance

    cols = {k: table[k] for k in list(keys) + list(by)}
    cols["expiry_years"] = table["expiry_years"]
    cols["variance"] = variance
    cols["status"] = status
    out = constant_maturity_variance(pa.table(cols), days=days, by=tuple(keys) + tuple(by))
    return out.rename_columns([f"{prefix}_{c}" if c in ("variance", "vol", "status",
                                                        "near_expiry_years",
                                                        "far_expiry_years") else c
                               for c in out.column_names])


def term_history(variance, smiles=None, days=(30,), by=("underlying",)) -> pa.Table:
    """Constant-maturity vols per partition (day) and underlying over a backfilled history.

    ``variance``: the folder a ``backfill(..., operation="variance")`` wrote (hive
    partitions such as ``date=2031-03-14/``; the partition keys become columns).
    ``smiles``: optionally, the folder of ``operation="smiles"`` over the same source.
    ``days``: horizons in calendar days.  ``by``: the columns of one surface besides the
    partition keys.  Returns one row per (partition, ``by`` group, horizon), ordered by
    the partition keys, the ``by`` columns and the horizons as given: the keys, the ``by``
    columns, ``horizon_days``, ``model_free_vol``, ``model_free_status`` and, with
    ``smiles``, ``atm_vol`` (the fitted smiles' ATM vols, interpolated the same way, in
    total variance) and ``atm_status``.
    """
    by = (by,) if isinstance(by, str) else tuple(by)
    table, keys = _read_dataset(variance, "variance")
    mf = _cm(table, keys, by, days, table["variance"], table["status"], "model_free")
    group = list(keys) + list(by) + ["horizon_days"]
    out = mf.select(group + ["model_free_vol", "model_free_status"])
    if smiles is None:
        return out
    st, skeys = _read_dataset(smiles, "smiles")
    if skeys != keys:
        raise ValueError(f"smiles: partition keys {skeys} differ from the variance's {keys}")
    atm = st["atm_vol"].cast(pa.float64())
    atm_var = pc.multiply(atm, atm)
    at = _cm(st, keys, by, days, atm_var, st["status"], "atm")
    at = at.select(group + ["atm_vol", "atm_status"])
    # both come ordered by keys, by and horizon: with the same groups, side by side
    if out.select(group).equals(at.select(group)):
        return out.append_column("atm_vol", at["atm_vol"]).append_column(
            "atm_status", at["atm_status"])
    # a group present on one side only keeps its row with nulls on the other: the union
    # of the groups (a null key is a key: a hash join would never match it, and would
    # give such a group twice), then the same order again (dictionary keys sorted by
    # their values)
    from .risk import group_ids

    both = pa.concat_tables([out.select(group), at.select(group)],
                            promote_options="permissive")
    gid, first = group_ids([both[c] for c in group], both.num_rows)
    sides = []
    for side, ids in ((out, gid[:out.num_rows]), (at, gid[out.num_rows:])):
        pick = np.full(len(first), -1, np.int64)
        pick[ids] = np.arange(side.num_rows)
        sides.append(pa.array(pick, pa.int64(), mask=pick < 0))
    joined = both.take(pa.array(first, pa.int64()))
    for c in ("model_free_vol", "model_free_status"):
        joined = joined.append_column(c, out[c].take(sides[0]))
    for c in ("atm_vol", "atm_status"):
        joined = joined.append_column(c, at[c].take(sides[1]))
    plain = {c: joined[c].cast(joined[c].type.value_type)
             if pa.types.is_dictionary(joined[c].type) else joined[c] for c in group}
    order = pc.sort_indices(pa.table(plain), sort_keys=[(c, "ascending") for c in group],
                            null_placement="at_end")
    return joined.take(order)


def draw(table: pa.Table, underlyings, path: str, horizon_days=None, key: str = "date",
         title: str | None = None) -> None:
    """One panel per underlying: model-free and ATM constant-maturity vols against
    ``key`` (the partition key holding the day)."""
    try:
        import matplotlib
    except ImportError:
        raise ImportError(INSTALL_HINT) from None
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    if horizon_days is None:
        horizon_days = table["horizon_days"][0].as_py() if table.num_rows else 30
    sel = table.filter(pc.equal(table["horizon_days"], horizon_days))
    underlyings = list(underlyings)
    fig, axes = plt.subplots(len(underlyings), 1, figsize=(7.5, 1.9 * len(underlyings) + 0.6),
                             dpi=90, sharex=True, squeeze=False)
    for ax, name in zip(axes[:, 0], underlyings):
        t = sel.filter(pc.equal(sel["underlying"].cast(pa.string()), name))
        x = np.array(t[key].cast(pa.string()).to_pylist(), dtype="datetime64[D]")
        for col, label, style in (("model_free_vol", "model-free", "-"),
                                  ("atm_vol", "ATM (SVI)", "--")):
            if col in t.column_names:
                y = t[col].to_numpy(zero_copy_only=False).astype(np.float64)
                ax.plot(x, 100.0 * y, style, lw=1.4, label=label)
        ax.set_ylabel(f"{name}\nvol %", fontsize=8)
        ax.grid(alpha=0.3)
        ax.tick_params(labelsize=7)
    axes[0, 0].legend(fontsize=7, loc="upper right")
    axes[0, 0].set_title(title or f"{horizon_days:g}-day constant-maturity vols", fontsize=9)
    fig.autofmt_xdate()
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
