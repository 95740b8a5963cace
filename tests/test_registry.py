"""The README's API reference against the code: the model, Greeks, status, input, output and
kernel tables and the documented signatures must agree with kernel/registry.py,
kernel/status.py, kernel/greeks.py and the public functions.

These are consistency checks of our own documentation (no outside reference is involved):
each fails when a model, Greek, status, argument or output column is added, renamed or
changed in the code without the README, or the other way round.
"""

import inspect
import re
from fractions import Fraction
from pathlib import Path

import pyarrow as pa
import pytest

import volsweep
from volsweep import _columns
from volsweep.kernel import greeks as kgreeks
from volsweep.kernel import registry, status

README = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")


# ----------------------------------------------------------------- README parsing

def _section(title: str) -> str:
    """The text under the heading ``title`` (any level), up to the next heading of the same
    or a higher level."""
    m = re.search(rf"^(#+) {re.escape(title)}\s*$", README, flags=re.M)
    assert m, f"README has no heading {title!r}"
    level = len(m.group(1))
    rest = README[m.end():]
    nxt = re.search(rf"^#{{1,{level}}} ", rest, flags=re.M)
    return rest[:nxt.start()] if nxt else rest


def _table(text: str, first_header: str) -> list:
    """Rows (lists of stripped cells) of the first Markdown table in ``text`` whose first
    header cell is ``first_header``."""
    lines = text.splitlines()
    for i, line in enumerate(lines):
        cells = _cells(line)
        if cells and cells[0] == first_header and i + 1 < len(lines) \
                and set(lines[i + 1].replace("|", "").strip()) <= set("-: "):
            rows = []
            for row in lines[i + 2:]:
                if not row.startswith("|"):
                    break
                rows.append(_cells(row))
            assert rows, f"empty table {first_header!r}"
            return rows
    raise AssertionError(f"no table with first column {first_header!r}")


def _cells(line: str) -> list:
    if not line.startswith("|"):
        return []
    return [c.strip() for c in re.split(r"(?<!\\)\|", line.strip().strip("|"))]


def _ticked(cell: str) -> list:
    """The `code` spans of a cell, in order."""
    return re.findall(r"`([^`]+)`", cell)


API = _section("API reference")


# ----------------------------------------------------------------------- models

def test_model_table_matches_registry():
    rows = _table(_section("Models"), "model")
    assert [_ticked(r[0])[0] for r in rows] == list(registry.MODEL_NAMES)
    for row in rows:
        m = registry.MODELS[_ticked(row[0])[0]]
        name, underlying, extras, greeks, doc = row
        assert _ticked(underlying) == [m.underlying], m.name
        # extra inputs: `name` (default X): doc, or a dash when there are none
        documented = re.findall(r"`(\w+)` \(default ([^)]+)\): ([^;]+)", extras)
        assert [(n, float(d), t.strip()) for n, d, t in documented] == \
            [(x.name, x.default, x.doc) for x in m.extras], m.name
        if not m.extras:
            assert extras == "—", m.name
        # Greeks: "all" or "all but `a`, `b`"
        assert greeks.startswith("all"), m.name
        left_out = set(_ticked(greeks))
        assert left_out <= set(kgreeks.GREEK_NAMES), m.name
        assert tuple(g for g in kgreeks.GREEK_NAMES if g not in left_out) == m.greeks, m.name
        assert doc == m.doc, m.name
    assert "All are European exercise." in _section("Models")
    assert {m.exercise for m in registry.MODELS.values()} == {"european"}


def test_input_table_names_every_known_input():
    rows = _table(_section("Input columns"), "column")
    documented = [name for r in rows for name in _ticked(r[0])]
    assert set(documented) == set(_columns.KNOWN_NAMES)
    for m in registry.MODELS.values():
        assert m.underlying in documented
        assert all(x.name in documented for x in m.extras)


# ----------------------------------------------------------------------- Greeks

def _ascii(definition: str) -> str:
    """The README's typeset definition in the registry's ASCII spelling."""
    for pretty, plain in (("²", "2"), ("³", "3"), ("σ", "sigma"), ("−", "-")):
        definition = definition.replace(pretty, plain)
    return definition


def test_greeks_table_matches_registry_and_desk_scale():
    rows = _table(_section("Greeks"), "name")
    assert [_ticked(r[0])[0] for r in rows] == list(kgreeks.GREEK_NAMES)
    assert tuple(registry.GREEKS) == kgreeks.GREEK_NAMES
    for name_cell, definition, raw, desk, scale in rows:
        name = _ticked(name_cell)[0]
        assert (_ascii(definition), raw, desk) == registry.GREEKS[name], name
        assert float(Fraction(scale)) == pytest.approx(kgreeks.DESK_SCALE[name],
                                                       rel=1e-15), name


# --------------------------------------------------------------------- statuses

def test_status_table_lists_every_code_in_order():
    rows = _table(_section("Failure behaviour"), "code")
    assert [(int(r[0]), _ticked(r[1])[0]) for r in rows] == list(enumerate(status.NAMES))


# ------------------------------------------------------------ functions and arguments

def _plain_signature(fn) -> str:
    sig = inspect.signature(fn)
    params = [p.replace(annotation=inspect.Parameter.empty) for p in sig.parameters.values()]
    return str(sig.replace(parameters=params,
                           return_annotation=inspect.Signature.empty))


def _public_functions() -> dict:
    fns = {name: getattr(volsweep, name) for name in volsweep.__all__}
    return {n: f for n, f in fns.items() if inspect.isfunction(f)}


def test_public_functions_are_the_expected_ones():
    # guards the checks below against an empty or shrunken list
    assert set(_public_functions()) == {"price", "implied_vol", "greeks", "sweep",
                                        "prepare", "warmup", "backfill",
                                        "position_greeks", "scenarios", "fit_smiles",
                                        "smile_vols", "implied_forwards", "model_free_variance",
                                        "constant_maturity_variance", "term_history"}


def test_api_reference_headings_match_signatures():
    headings = re.findall(r"^#### `volsweep\.(\w+)(\(.*\))`\s*$", API, flags=re.M)
    documented = dict(headings)
    assert len(documented) == len(headings), "a function is documented twice"
    fns = _public_functions()
    assert set(documented) == set(fns)
    for name, fn in fns.items():
        assert documented[name] == _plain_signature(fn), name
    # the public data names and classes have headings of their own
    data_names = set(volsweep.__all__) - set(fns)
    headings = re.findall(r"^#### ((?:`volsweep\.\w+`(?:, )?)+)\s*$", API, flags=re.M)
    named = {n for h in headings for n in re.findall(r"volsweep\.(\w+)", h)}
    assert headings and named == data_names


def test_every_parameter_is_documented():
    shared = {_ticked(r[0])[0] for r in _table(_section("Functions"), "argument")}
    fns = _public_functions()
    used = set()
    for name, fn in fns.items():
        text = _section(f"`volsweep.{name}{_plain_signature(fn)}`")
        for p in inspect.signature(fn).parameters:
            used.add(p)
            assert p in shared or f"`{p}`" in text, f"{name}({p}) is not documented"
    assert shared <= used, f"stale rows in the arguments table: {shared - used}"


def test_prepare_cache_size_is_the_documented_one():
    from volsweep import api
    assert f"{api._PREPARED_MAX} entries at most" in API


# ---------------------------------------------------------------- output columns

def _schema(model, needs, quote="premium"):
    m = registry.MODELS[model]
    names = [m.underlying, "strike", "expiry_years", "rate"] + [x.name for x in m.extras]
    fields = [pa.field(n, pa.float64()) for n in names] + [pa.field("is_call", pa.bool_())]
    more = ["vol"] if needs == "vol" else (["premium"] if quote == "premium" else ["bid", "ask"])
    return pa.schema(fields + [pa.field(n, pa.float64()) for n in more])


def _outputs():
    """operation -> every output column it can produce, over models and quote forms."""
    out = {}
    for op_name, op in registry.OPERATIONS.items():
        cols = []
        for model in registry.MODEL_NAMES:
            for quote in (("premium", "bid_ask") if op.needs == "quote" else ("none",)):
                prep = volsweep.prepare(op_name, _schema(model, op.needs, quote), model=model)
                cols += prep.outputs
        out[op_name] = list(dict.fromkeys(cols))
    return out


def test_output_columns_table_matches_the_operations():
    rows = _table(_section("Output columns"), "column")
    table = {}
    for r in rows:
        for col in _ticked(r[0]):
            table[col] = set(_ticked(r[1])) | ({"price", "implied_vol", "greeks", "sweep"}
                                               if r[1] == "all" else set())
    produced = _outputs()
    assert set(produced) == set(registry.OPERATIONS)
    greek_cols = set(kgreeks.GREEK_NAMES)
    seen = set()
    for op, cols in produced.items():
        # the operation's own subsection names its non-Greek outputs
        fn = getattr(volsweep, op)
        text = _section(f"`volsweep.{op}{_plain_signature(fn)}`")
        for col in cols:
            if col in greek_cols:
                continue                     # the Greeks table lists them (checked above)
            seen.add(col)
            assert col in table, f"output {col!r} of {op} missing from Output columns"
            assert op in table[col], f"Output columns: {col!r} does not list {op}"
            assert f"`{col}`" in text, f"{op}'s section does not name {col!r}"
        # the registry's symbolic outputs are the ones produced
        for sym in registry.OPERATIONS[op].outputs:
            if not sym.startswith("<"):
                assert sym in cols, (op, sym)
        if "<greeks>" in registry.OPERATIONS[op].outputs:
            assert greek_cols <= set(cols), op
    assert set(table) == seen, f"stale rows in Output columns: {set(table) - seen}"


# ---------------------------------------------------------------- kernel entry points

def _convention_args(cell: str, model) -> list:
    args = [a.strip() for a in _ticked(cell)[0].strip("()").split(",")]
    out = []
    for a in args:
        out += [x.name for x in model.extras] if a == "*extras" else [a]
    return out


def test_kernel_tables_match_the_registry():
    text = _section("Kernel entry points")
    conv = _table(text, "operation")
    assert [_ticked(r[0])[0] for r in conv] == list(registry.KERNEL_OPERATIONS)
    names = _table(text, "model")
    assert [_ticked(r[0])[0] for r in names] == list(registry.MODEL_NAMES)
    for row in names:
        m = registry.MODELS[_ticked(row[0])[0]]
        for op, cell, conv_row in zip(registry.KERNEL_OPERATIONS, row[1:], conv):
            fn = m.kernels[op]
            assert _ticked(cell) == [f"{fn.__module__.rsplit('.', 1)[1]}.{fn.__name__}"], \
                (m.name, op)
            params = list(inspect.signature(fn).parameters)
            documented = _convention_args(conv_row[1], m)
            assert len(documented) == len(params), (m.name, op, documented, params)
            # the inputs that carry their names through: strike, time, discount, vol, cp, mask
            for doc_name, param in zip(documented, params):
                if doc_name in ("K", "T", "D", "vol", "cp", "mask", "premium", "bid", "ask"):
                    assert doc_name == param, (m.name, op, doc_name, param)


def test_per_model_unit_table_matches_registry():
    # the Greeks whose units differ by model (a normal vol's), as registry Model.units
    rows = _table(_section("Greeks"), "model")
    documented = {(_ticked(r[0])[0], _ticked(r[1])[0]): (r[2], r[3]) for r in rows}
    expected = {(m.name, g): u for m in registry.MODELS.values() for g, u in m.units.items()}
    assert documented == expected
