"""Property-based tests of the edges: whatever the input, pmap answers or raises its own error.

Arbitrary sample tables (any header, any cell text, any separator, preambles, encodings),
arbitrary cells for the value parser, and arbitrary TOML documents and dicts for the config
loader.  The readers may refuse an input, but only with a :class:`pmap.errors.PmapError`
(:class:`~pmap.errors.ConfigError` for the config); any other exception is a bug.
"""

from __future__ import annotations

import dataclasses
import math
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pmap.config import FieldConfig, config_from_dict, load_config
from pmap.errors import ConfigError, PmapError, PmapWarning
from pmap.io.samples import SampleColumns, load_samples, read_samples
from pmap.io.units import CANONICAL_UNITS, split_unit, to_canonical
from pmap.io.values import ValueParser, parse_number

FAST = settings(max_examples=150, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

# Headers a lab might write, mixed with arbitrary text, so that many tables get far enough
# to exercise value parsing, units and range checks.
KNOWN_HEADERS = ["sample_id", "lat", "lon", "latitude", "longitude", "x", "y", "ph",
                 "pH (H2O)", "total_p", "Total P (%)", "total_p (g/kg)", "p_m3", "P_M3_lb_ac",
                 "bray1_p (ppm)", "olsen_p", "stp", "clay_pct", "% OM", "caco3 [g/kg]",
                 "base_sat", "Fe", "Al (meq/100g)", "Ca (cmol(+)/kg)", "buffer_ph",
                 "pH (ppm)", "P kg/ha", "P (mg/dm3)", ""]
CELL_TEXT = st.one_of(
    st.sampled_from(["6.1", "5,3", "<5", "< 0,5", "n.d.", "", "nan", "inf", "-inf", "1e400",
                     "1e-400", "40.1", "-88.9", "1,234", "1.234,5", "#DIV/0!", "-nan(ind)",
                     "0", "-3", "61", "5000", "0.05", "ab\"c", "\"q,\"", "1e308"]),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.text(max_size=8),
)
HEADER = st.one_of(st.sampled_from(KNOWN_HEADERS), st.text(max_size=10))


def _quote(cell: str, sep: str) -> str:
    if any(ch in cell for ch in (sep, '"', "\n", "\r")):
        return '"' + cell.replace('"', '""') + '"'
    return cell


@st.composite
def tables(draw):
    sep = draw(st.sampled_from([",", ";", "\t", "|"]))
    n_cols = draw(st.integers(1, 6))
    headers = draw(st.lists(HEADER, min_size=n_cols, max_size=n_cols))
    n_rows = draw(st.integers(0, 5))
    rows = draw(st.lists(st.lists(CELL_TEXT, min_size=n_cols, max_size=n_cols),
                         min_size=n_rows, max_size=n_rows))
    preamble = draw(st.lists(st.text(max_size=20), max_size=3))
    quote = draw(st.booleans())
    lines = [*preamble, *(sep.join(_quote(c, sep) if quote else c for c in line)
                          for line in [headers, *rows])]
    text = draw(st.sampled_from(["\n", "\r\n"])).join(lines)
    encoding = draw(st.sampled_from(["utf-8", "utf-8-sig", "utf-16", "utf-16-le", "cp1252"]))
    try:
        data = text.encode(encoding)
    except UnicodeEncodeError:
        data = text.encode("utf-8")
    return data


NUMBER_TEXT = st.floats(0, 1e4).map(lambda v: f"{v:.3f}")


@st.composite
def lab_tables(draw):
    """Tables with coordinate, pH and P columns, so that most reach the value checks."""
    sep = draw(st.sampled_from([",", ";", "\t"]))
    coords = draw(st.sampled_from([("lat", "lon"), ("x", "y"), ("Latitude", "Longitude")]))
    props = [draw(st.sampled_from(["ph", "pH (H2O)", "pH (ppm)", "ph_cacl2"])),
             draw(st.sampled_from(["total_p", "Total P (%)", "total_p (g/kg)", "P_M3_lb_ac",
                                   "olsen_p", "bray1_p (ppm)", "TP (mg/dm3)", "P2O5 (mg/100g)"]))]
    extras = draw(st.lists(HEADER, max_size=3))
    headers = draw(st.permutations(list(dict.fromkeys(["sample_id", *coords, *props, *extras]))))
    n_rows = draw(st.integers(1, 6))
    messy = draw(st.integers(0, 2)) == 0  # a third of the tables hold some odd cells
    numbers = {"lat": st.floats(39, 41), "Latitude": st.floats(39, 41), "lon": st.floats(-90, -88),
               "Longitude": st.floats(-90, -88), "x": st.floats(3e5, 7e5), "y": st.floats(3e5, 7e5),
               **dict.fromkeys(["ph", "pH (H2O)", "pH (ppm)", "ph_cacl2"], st.floats(3, 9))}
    rows = []
    for _ in range(n_rows):
        row = []
        for h in headers:
            if messy and draw(st.integers(0, 4)) == 0:
                row.append(draw(CELL_TEXT))
            elif h in numbers:
                row.append(f"{draw(numbers[h]):.6f}")
            else:
                row.append(draw(NUMBER_TEXT))
        rows.append(row)
    lines = [sep.join(_quote(c, sep) for c in line) for line in [headers, *rows]]
    preamble = draw(st.lists(st.sampled_from(["Acme Soil Lab", "Report date: 2024-03-01", "",
                                              "Client, Smith Farm"]), max_size=3))
    return "\n".join([*preamble, *lines]).encode(draw(st.sampled_from(["utf-8", "utf-16"])))


def _read(data: bytes, suffix: str = ".csv", **kwargs):
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / f"lab{suffix}"
        path.write_bytes(data)
        with warnings.catch_warnings():
            warnings.simplefilter("error")  # any warning but pmap's own is a leak
            warnings.simplefilter("ignore", PmapWarning)
            try:
                return read_samples(path, **kwargs)
            except PmapError:
                return None


@FAST
@given(data=tables(), crs=st.sampled_from([None, "EPSG:32616"]))
def test_sample_reader_returns_or_raises_pmap_error(data, crs):
    result = _read(data, crs=crs)
    if result is not None:
        n = len(result.ids)
        assert n > 0 and result.coords.shape == (n, 2) and np.isfinite(result.coords).all()
        for key, values in result.values.items():
            assert values.shape == (n,) and not np.isinf(values).any(), key
        assert result.rows.shape == (n,) and all(isinstance(s, str) for s in result.notes)


@FAST
@given(data=lab_tables(), tolerance=st.sampled_from([None, 0.0, 5.0, 1e9]))
def test_sample_loader_on_lab_like_tables(data, tolerance):
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "lab.csv"
        path.write_bytes(data)
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            warnings.simplefilter("ignore", PmapWarning)
            try:
                table = load_samples(path, columns=SampleColumns(stp_method="olsen"),
                                     input_crs="EPSG:32616", duplicate_tolerance_m=tolerance)
            except PmapError:
                return
    n = len(table)
    assert n >= 1 and table.coords.shape == (n, 2) and table.lonlat.shape == (n, 2)
    for key, values in table.values.items():
        assert values.shape == (n,) and not np.isinf(values).any(), key
    assert table.subset(np.ones(n, dtype=bool)).notes == table.notes


@FAST
@given(data=st.binary(max_size=300), suffix=st.sampled_from([".csv", ".tsv", ".txt", ".xlsx"]))
def test_sample_reader_on_arbitrary_bytes(data, suffix):
    _read(data, suffix)


@FAST
@given(headers=st.lists(HEADER, min_size=1, max_size=6),
       names=st.lists(st.one_of(st.none(), HEADER), min_size=6, max_size=6))
def test_sample_reader_with_named_columns(headers, names):
    text = ",".join(headers) + "\n" + ",".join(["5"] * len(headers)) + "\n"
    try:
        cols = SampleColumns(x_column=names[0], y_column=names[0] and names[1],
                             id_column=names[2], ph_column=names[3], total_p_column=names[4],
                             stp_column=names[5])
    except ConfigError:
        return
    _read(text.encode(), columns=cols, crs="EPSG:32616")


# ----------------------------------------------------------------------------- values


@FAST
@given(text=st.text(max_size=30), thousands=st.booleans())
def test_parse_number_returns_a_float_or_none(text, thousands):
    out = parse_number(text, thousands_commas=thousands)
    assert out is None or isinstance(out, float)


@FAST
@given(x=st.floats(allow_nan=False, allow_infinity=False))
def test_parse_number_reads_what_python_writes(x):
    # common practice, no source: repr() of a float reads back exactly
    assert parse_number(repr(x), thousands_commas=False) == x
    if "e" not in repr(x) and "." in repr(x):
        assert parse_number(repr(x).replace(".", ","), thousands_commas=False) == x


@FAST
@given(cells=st.lists(st.one_of(st.none(), st.floats(), st.integers(-10**30, 10**30), CELL_TEXT),
                      max_size=8),
       allow_below=st.booleans(), thousands=st.booleans())
def test_value_parser_gives_finite_or_nan_or_input_error(cells, allow_below, thousands):
    parser = ValueParser("lab.csv", np.arange(2, len(cells) + 2), thousands_commas=thousands)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        warnings.simplefilter("ignore", PmapWarning)
        try:
            out = parser(pd.Series(cells, dtype=object), "p_m3", allow_below=allow_below)
        except PmapError:
            return
    assert out.dtype == np.float64 and out.shape == (len(cells),)
    assert not np.isinf(out).any()


@FAST
@given(header=HEADER, values=st.lists(st.floats(0, 1e6, allow_subnormal=False), min_size=1,
                                        max_size=4),
       prop=st.sampled_from(sorted(CANONICAL_UNITS)))
def test_unit_conversion_converts_or_refuses(header, values, prop):
    name, unit, found = split_unit(header)
    assert isinstance(name, str) and (unit is None) == (found == "")
    try:
        out, note = to_canonical(prop, header, np.array(values), "lab.csv")
    except PmapError as exc:
        assert repr(header) in str(exc)
        return
    assert out.shape == (len(values),)
    if note is None:  # nothing converted: the values are untouched
        assert np.array_equal(out, values)
    else:  # converted: the note names the column, and zeros stay zeros
        assert f"column {header!r}" in note
        assert np.array_equal(out == 0, np.array(values) == 0)


# ----------------------------------------------------------------------------- config

SECTIONS = {f.name: f.default_factory for f in dataclasses.fields(FieldConfig)}
KEYS = {name: [f.name for f in dataclasses.fields(cls)] for name, cls in SECTIONS.items()}
SCALARS = st.one_of(st.booleans(), st.integers(-10**20, 10**20),
                    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=12))
TOML_VALUES = st.one_of(SCALARS, st.lists(SCALARS, max_size=4),
                        st.dictionaries(st.text(max_size=5), SCALARS, max_size=2))


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return '"' + "".join(ch if ch.isprintable() and ch not in '"\\' else f"\\u{ord(ch):04x}"
                             for ch in v) + '"'
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return "{" + ", ".join(f"{_toml_value(k)} = {_toml_value(x)}" for k, x in v.items()) + "}"


@st.composite
def config_documents(draw):
    doc = {}
    for section in draw(st.lists(st.one_of(st.sampled_from(sorted(SECTIONS)), st.text(max_size=6)),
                                 max_size=3, unique=True)):
        keys = KEYS.get(section, [])
        names = draw(st.lists(st.one_of(st.sampled_from(keys), st.text(max_size=6))
                              if keys else st.text(max_size=6), max_size=4, unique=True))
        doc[section] = {k: draw(TOML_VALUES) for k in names}
    return doc


def _toml(doc: dict) -> str:
    lines = []
    for section, keys in doc.items():
        lines.append(f"[{_toml_value(section)}]")
        lines += [f"{_toml_value(k)} = {_toml_value(v)}" for k, v in keys.items()]
    return "\n".join(lines) + "\n"


def _load(data: bytes):
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "field.toml"
        path.write_bytes(data)
        try:
            return load_config(path)
        except ConfigError:
            return None


@FAST
@given(doc=config_documents(), encoding=st.sampled_from(["utf-8", "utf-8-sig", "utf-16"]))
def test_load_config_returns_or_raises_config_error(doc, encoding):
    text = _toml(doc)
    cfg = _load(text.encode(encoding))
    if cfg is not None:
        assert isinstance(cfg, FieldConfig)
        assert _load(text.encode("utf-8")) == cfg  # the byte-order mark changes nothing


@FAST
@given(data=st.one_of(st.binary(max_size=200), st.text(max_size=200).map(str.encode)))
def test_load_config_on_arbitrary_bytes(data):
    _load(data)


@FAST
@given(data=st.one_of(
    config_documents(),
    st.dictionaries(st.one_of(st.sampled_from(sorted(SECTIONS)), st.text(max_size=5)),
                    st.one_of(SCALARS, st.dictionaries(st.text(max_size=5), TOML_VALUES,
                                                       max_size=3)), max_size=3)))
def test_config_from_dict_returns_or_raises_config_error(data):
    try:
        cfg = config_from_dict(data)
    except ConfigError:
        return
    assert isinstance(cfg, FieldConfig)


def test_the_strategies_reach_valid_inputs():
    # A property test whose inputs are all refused tests nothing: the strategies above must
    # also produce inputs the readers accept.
    text = "sample_id\tlat\tlon\tph\tTotal P (%)\nS1\t40.1\t-88.9\t6.1\t0.05\n"
    result = _read(text.encode("utf-16"))
    assert result is not None and result.values["total_p"][0] == pytest.approx(500.0)
    assert _load(_toml({"grid": {"cell_size_m": 10.0}}).encode("utf-8-sig")).grid.cell_size_m == 10


# ----------------------------------------------------------------------------- config encodings


@pytest.mark.parametrize("encoding", ["utf-8-sig", "utf-16", "utf-16-be-bom"])
def test_config_with_a_byte_order_mark_is_read(encoding):
    text = '[grid]\ncell_size_m = 10.0\n\n[field]\nname = "Süd"\n'
    data = (b"\xfe\xff" + text.encode("utf-16-be") if encoding == "utf-16-be-bom"
            else text.encode(encoding))
    cfg = _load(data)
    assert cfg is not None and cfg.grid.cell_size_m == 10.0 and cfg.field.name == "Süd"


def test_config_that_is_not_utf8_names_the_file():
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "latin.toml"
        path.write_bytes('[field]\nname = "Süd"\n'.encode("latin-1"))
        with pytest.raises(ConfigError, match=r"latin\.toml: not UTF-8 text \(byte 17 is 0xfc\): "
                                              r"save the file as UTF-8"):
            load_config(path)
