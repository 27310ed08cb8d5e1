"""Property-based tests: any text or bytes either loads into a valid object or raises DataError.

# common practice, no published source: a loader fed arbitrary input must fail with its
# own error type, never with an unrelated exception from deep inside a parser.
"""

from __future__ import annotations

import io
import tempfile
import warnings
from pathlib import Path

import numpy as np
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from polkit.data import load_map, load_series, validate_map, validate_series
from polkit.errors import DataError, DataWarning

SETTINGS = settings(max_examples=100, deadline=None)


def _try(path: Path, **options):
    """Load as map and as series; each must give a valid object or a DataError."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
        for loader, check in ((load_map, validate_map), (load_series, validate_series)):
            try:
                obj = loader(path, **options)
            except DataError as err:
                assert str(err).startswith(str(path)), str(err)
                continue
            check(obj)


def _with_file(data: bytes, suffix: str, **options) -> None:
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / f"fuzz{suffix}"
        path.write_bytes(data)
        _try(path, **options)


# ----------------------------------------------------------------------------- text
_cell = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-(10**6), 10**6).map(str),
    st.sampled_from(["", " ", "1,5", "nan", "-inf", "up", "down", "1e999", "0x10", "1_000"]),
    st.text(max_size=6),
)
_header_cell = st.one_of(
    st.sampled_from(
        [
            "power [mW]",
            "power [uW]",
            "power",
            "intensity [counts]",
            "intensity",
            "peak_energy [eV]",
            "wavelength [nm]",
            "linewidth [meV]",
            "linewidth [nm]",
            "linewidth_error [meV]",
            "intensity_error [counts]",
            "sweep",
            "temperature [K]",
            "a [b [c]]",
            "[mW]",
        ]
    ),
    st.text(max_size=12),
)


@st.composite
def csv_tables(draw):
    delimiter = draw(st.sampled_from([",", ";", "\t"]))
    newline = draw(st.sampled_from(["\n", "\r\n"]))
    header = draw(st.lists(_header_cell, min_size=1, max_size=6))
    n_rows = draw(st.integers(0, 8))
    width = draw(st.sampled_from([len(header), len(header) + 1, max(len(header) - 1, 1)]))
    rows = [draw(st.lists(_cell, min_size=width, max_size=width)) for _ in range(n_rows)]
    lines = [delimiter.join(header)] + [delimiter.join(r) for r in rows]
    if draw(st.booleans()):
        lines.insert(draw(st.integers(0, len(lines))), "# " + draw(st.text(max_size=20)))
    text = newline.join(lines)
    data = text.encode("utf-8", "surrogatepass")
    if draw(st.booleans()):
        data = b"\xef\xbb\xbf" + data
    return data


@st.composite
def valid_ish_series(draw):
    n = draw(st.integers(1, 8))
    powers = draw(st.lists(st.floats(-1, 100, allow_nan=False), min_size=n, max_size=n))
    inten = draw(st.lists(st.floats(-10, 1e6, allow_nan=False), min_size=n, max_size=n))
    sweep = draw(st.lists(st.sampled_from(["up", "down", "Up ", "x"]), min_size=n, max_size=n))
    use_sweep = draw(st.booleans())
    head = "power [mW],intensity [counts]" + (",sweep" if use_sweep else "")
    lines = [head] + [
        f"{p!r},{i!r}" + (f",{s}" if use_sweep else "")
        for p, i, s in zip(powers, inten, sweep, strict=True)
    ]
    return "\n".join(lines).encode()


@st.composite
def matrices(draw):
    n_rows = draw(st.integers(1, 3) | st.integers(18, 30))
    n_cols = draw(st.integers(1, 3) | st.integers(5, 9))
    delimiter = draw(st.sampled_from([" ", "\t", ",", ";"]))
    header = draw(
        st.sampled_from(
            [
                "",
                "# rows: wavelength [nm]; columns: angle [degree]; signal: counts\n",
                "# rows: wavelength [nm]; columns: k [1/um]; signal: counts; kind: reflectance\n",
                "# rows: wavenumber [1/cm]; columns: angle [degree]; signal: counts\n",
                "# rows: wavelength [nm]; columns: power [mW]; signal: counts\n",
                "# rows: energy; columns: energy\n",
            ]
        )
    )
    axis = sorted(
        draw(
            st.lists(
                st.floats(-40, 89, allow_nan=False), min_size=n_cols, max_size=n_cols, unique=True
            )
        )
    )
    leads = sorted(
        draw(
            st.lists(
                st.floats(300, 1200, allow_nan=False),
                min_size=n_rows,
                max_size=n_rows,
                unique=True,
            )
        )
    )
    grid = [
        [repr(v) for v in draw(st.lists(st.floats(1, 1e4), min_size=n_cols, max_size=n_cols))]
        for _ in range(n_rows)
    ]
    for _ in range(draw(st.integers(0, 2))):  # corrupt a few cells
        i, j = draw(st.integers(0, n_rows - 1)), draw(st.integers(0, n_cols - 1))
        grid[i][j] = draw(_cell)
    rows = [delimiter.join([repr(lead)] + body) for lead, body in zip(leads, grid, strict=True)]
    text = header + delimiter.join(["0"] + [repr(a) for a in axis]) + "\n" + "\n".join(rows)
    options = {} if header else {"energy_units": "nm", "angle_units": "degree"}
    if not header or draw(st.booleans()):
        options["signal_units"] = "counts"
    return text.encode("utf-8", "surrogatepass"), options


@SETTINGS
@given(st.text(max_size=300))
def test_csv_reader_on_arbitrary_text(text):
    _with_file(text.encode("utf-8", "surrogatepass"), ".csv", reader="csv")


@SETTINGS
@given(csv_tables())
def test_csv_reader_on_table_like_text(data):
    _with_file(data, ".csv")


@SETTINGS
@given(valid_ish_series())
def test_csv_reader_on_nearly_valid_series(data):
    _with_file(data, ".csv")


@SETTINGS
@given(st.text(max_size=300))
def test_matrix_reader_on_arbitrary_text(text):
    _with_file(text.encode("utf-8", "surrogatepass"), ".txt", reader="matrix")


@SETTINGS
@given(matrices())
def test_matrix_reader_on_matrix_like_text(case):
    data, options = case
    _with_file(data, ".txt", **options)


# ----------------------------------------------------------------------------- bytes
def _valid_npz() -> bytes:
    buf = io.BytesIO()
    np.savez(
        buf,
        signal=np.ones((6, 20)),
        angle=np.linspace(-5, 5, 6),
        wavelength=np.linspace(830, 850, 20),
        units_signal="counts",
        units_angle="degree",
        units_wavelength="nm",
    )
    return buf.getvalue()


def _valid_netcdf() -> bytes:
    ds = xr.Dataset(
        {"signal": (("angle", "energy"), np.ones((6, 20)), {"units": "counts"})},
        coords={
            "angle": ("angle", np.linspace(-5, 5, 6), {"units": "degree"}),
            "energy": ("energy", np.linspace(1.4, 1.5, 20), {"units": "eV"}),
        },
    )
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "v.nc"
        ds.to_netcdf(path, engine="h5netcdf")
        return path.read_bytes()


VALID_NPZ = _valid_npz()
VALID_NC = _valid_netcdf()


@st.composite
def mutated(draw, original: bytes):
    data = bytearray(original)
    for _ in range(draw(st.integers(1, 8))):
        i = min(int(draw(st.floats(0, 1)) * len(data)), len(data) - 1)
        data[i] = draw(st.integers(0, 255))
    if draw(st.booleans()):
        data = data[: draw(st.integers(0, len(data)))]
    return bytes(data)


_prefixes = st.sampled_from([b"", b"PK\x03\x04", b"\x89HDF\r\n\x1a\n", b"CDF\x01", b"CDF\x02"])


@SETTINGS
@given(_prefixes, st.binary(max_size=400))
def test_npz_reader_on_random_bytes(prefix, data):
    _with_file(prefix + data, ".npz", reader="npz")


@SETTINGS
@given(mutated(VALID_NPZ))
def test_npz_reader_on_damaged_archives(data):
    _with_file(data, ".npz")


@SETTINGS
@given(_prefixes, st.binary(max_size=400))
def test_netcdf_reader_on_random_bytes(prefix, data):
    _with_file(prefix + data, ".nc", reader="netcdf")


@SETTINGS
@given(mutated(VALID_NC))
def test_netcdf_reader_on_damaged_files(data):
    _with_file(data, ".nc")


@SETTINGS
@given(st.text(alphabet="0123456789.eE+-", min_size=1, max_size=12))
def test_fast_numeric_path_agrees_with_the_strict_parser(cell):
    # the matrix reader parses plain ASCII rows with numpy; it must accept exactly the
    # cells the strict parser accepts, with the same values
    from polkit.data.text import parse_number

    try:
        fast = float(np.array([cell], dtype=float)[0])
    except ValueError:
        fast = None
    try:
        strict = parse_number(cell)
    except DataError:
        strict = None
    assert fast == strict or (fast is not None and strict is not None and np.isnan(fast))
