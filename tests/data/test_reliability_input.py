"""Bad input is refused clearly: fuzzed loaders, the command line's one-line refusals, strict
configuration files, and nothing that unpickles or evaluates.

The property tests here add to tests/data/test_data_fuzz.py (arbitrary text and bytes) what a lab
actually produces: tables exported with another encoding (latin-1, cp1252, UTF-16 with its
BOM), Windows or old Mac line ends, decimal commas, typos in the units, files cut short by a
full disk or an interrupted copy (netCDF, plain HDF5, .npz), and configuration files with
arbitrary keys and values.  Every example must load into a valid object or raise polkit's own
error, never another exception, and never hang (a per-example guard).  The default profile
is small; ``pytest -m slow`` runs thousands of examples per property.  All data are invented.
"""

from __future__ import annotations

import contextlib
import faulthandler
import io as _io
import re
import signal
import tempfile
import warnings
from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from polkit.cli import main
from polkit.config.calibration import load_calibration
from polkit.config.device import load_device
from polkit.config.priors import apply_priors
from polkit.data import load_map, load_series, make_map, validate_map, validate_series
from polkit.errors import ConfigError, DataError, DataWarning
from polkit.inference import Parameter, ParameterSpace, Prior

PACKAGE = Path(__file__).resolve().parents[2] / "polkit"
GUARD_S = 20  # a loader still busy after this long on a few-kB file is hung


# ----------------------------------------------------------------------------------------
# the hang guard
# ----------------------------------------------------------------------------------------
class LoaderHung(BaseException):
    """Raised by the guard; a BaseException so that no ``except Exception`` can swallow it."""


@contextlib.contextmanager
def hang_guard(seconds: int = GUARD_S):
    """Fail an example that runs for ``seconds``; kill the run if C code ignores the signal.

    SIGALRM interrupts Python code; faulthandler, armed at four times the limit, dumps every
    thread and exits should a C library hold the interpreter (a hang then fails CI instead
    of stalling it).  # common practice, no published source
    """

    def on_alarm(signum, frame):
        raise LoaderHung(f"a loader ran for more than {seconds} s on a small file")

    previous = signal.signal(signal.SIGALRM, on_alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    faulthandler.dump_traceback_later(4 * seconds, exit=True)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)
        faulthandler.cancel_dump_traceback_later()


def _load_everything(path: Path, **options) -> None:
    """Load as a map and as a series: a valid object or a DataError naming the file."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataWarning)
        warnings.simplefilter("ignore", RuntimeWarning)
        for loader, check in ((load_map, validate_map), (load_series, validate_series)):
            with hang_guard():
                try:
                    obj = loader(path, **options)
                except DataError as err:
                    assert str(err).startswith(str(path)), str(err)
                    continue
            check(obj)


def _with_file(data: bytes, suffix: str, **options) -> None:
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / f"case{suffix}"
        path.write_bytes(data)
        _load_everything(path, **options)


def _profiles(strategy, prop, n_default: int, n_slow: int):
    """A property as a default test and as a ``slow`` one with many more examples."""

    def build(n: int, derandomize: bool):
        def run(case):
            prop(case)

        run.__doc__ = prop.__doc__
        return settings(max_examples=n, deadline=None, derandomize=derandomize, database=None,
                        suppress_health_check=[HealthCheck.too_slow])(given(strategy)(run))

    return build(n_default, True), pytest.mark.slow(build(n_slow, False))


# ----------------------------------------------------------------------------------------
# text tables as instruments and spreadsheets export them
# ----------------------------------------------------------------------------------------
_UNITS = {
    "power": ["mW", "uW", "µW", "W", "nW"],
    "intensity": ["counts", "a.u.", "1"],
    "peak_energy": ["eV", "meV"],
    "wavelength": ["nm"],
    "linewidth": ["meV", "ueV"],
}


def _typo(draw, units: str) -> str:
    """One typing slip in a units string (or none)."""
    kind = draw(st.sampled_from(["none", "none", "case", "space", "drop", "double", "greek",
                                 "unclosed", "unknown", "empty"]))
    if kind == "case":
        return units.swapcase()
    if kind == "space" and units:
        i = draw(st.integers(0, len(units)))
        return units[:i] + " " + units[i:]
    if kind == "drop" and units:
        i = draw(st.integers(0, len(units) - 1))
        return units[:i] + units[i + 1 :]
    if kind == "double" and units:
        return units + units[-1]
    if kind == "greek":
        return units.replace("u", "μ").replace("µ", "u")
    if kind == "unknown":
        return draw(st.sampled_from(["furlong", "mWatt", "ev", "mw", "cnts", "deg", "%"]))
    if kind == "empty":
        return ""
    if kind == "unclosed":
        return units + "]["  # the caller wraps it in brackets: "[mW]["
    return units


@st.composite
def exported_tables(draw) -> bytes:
    """A power-series table with an instrument's quirks applied."""
    names = ["power", "intensity"] + draw(st.lists(
        st.sampled_from(["peak_energy", "wavelength", "linewidth", "intensity_error",
                         "sweep", "temperature"]), max_size=3, unique=True))
    header = []
    for name in names:
        if name == "sweep":
            header.append("sweep")
            continue
        base = name.removesuffix("_error")
        units = draw(st.sampled_from(_UNITS.get(base, ["K"])))
        header.append(f"{name} [{_typo(draw, units)}]")
    n = draw(st.integers(0, 9))
    rows = []
    for _ in range(n):
        row = []
        for name in names:
            if name == "sweep":
                row.append(draw(st.sampled_from(["up", "down", "Up", "", "x"])))
            else:
                row.append(repr(draw(st.floats(-1e3, 1e4) | st.just(float("nan"))))
                           if draw(st.integers(0, 9)) else "")
        rows.append(row)
    delimiter = draw(st.sampled_from([",", ";", "\t"]))
    decimal_comma = draw(st.booleans()) and delimiter != ","
    lines = [delimiter.join(header)]
    for row in rows:
        cells = [c.replace(".", ",") if decimal_comma else c for c in row]
        lines.append(delimiter.join(cells))
    if draw(st.booleans()):
        lines.insert(0, "# " + draw(st.sampled_from(
            ["invented sample DS-9 at 4 K", "température 4 K", "Probe: Ångström-Test",
             "measured by nobody", "T = 4 °C"])))
    newline = draw(st.sampled_from(["\n", "\r\n", "\r"]))
    text = newline.join(lines) + draw(st.sampled_from(["", newline]))
    encoding = draw(st.sampled_from(["utf-8", "utf-8-sig", "latin-1", "cp1252", "utf-16",
                                     "utf-16-le", "utf-32"]))
    data = text.encode(encoding, errors="replace")
    if draw(st.integers(0, 4)) == 0:  # cut short by an interrupted copy
        data = data[: draw(st.integers(0, len(data)))]
    return data


@st.composite
def exported_matrices(draw) -> tuple[bytes, dict]:
    """A map as a text matrix (axis vectors in the first row and column), with quirks."""
    n_rows, n_cols = draw(st.integers(1, 25)), draw(st.integers(1, 7))
    rows_axis = draw(st.sampled_from(["wavelength", "energy", "wavenumber"]))
    units = {"wavelength": "nm", "energy": "eV", "wavenumber": "1/cm"}[rows_axis]
    lo = {"wavelength": 820.0, "energy": 1.50, "wavenumber": 11800.0}[rows_axis]
    step = {"wavelength": 0.5, "energy": 0.001, "wavenumber": 5.0}[rows_axis]
    col_axis = draw(st.sampled_from(["angle [degree]", "k [1/um]", "angle [deg]"]))
    header = (f"# rows: {rows_axis} [{_typo(draw, units)}]; columns: {col_axis}; "
              f"signal: intensity [{_typo(draw, 'counts')}]")
    delimiter = draw(st.sampled_from([" ", "\t", ";", ","]))
    decimal_comma = draw(st.booleans()) and delimiter not in (",",)
    angles = np.linspace(-10.0, 10.0, n_cols)
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    values = rng.uniform(0.0, 1000.0, (n_rows, n_cols))
    if draw(st.booleans()):
        values[rng.integers(n_rows), rng.integers(n_cols)] = np.nan
    lines = [header, delimiter.join(["0"] + [f"{a:.3f}" for a in angles])]
    for i in range(n_rows):
        lines.append(delimiter.join([f"{lo + i * step:.4f}"] + [f"{v:.2f}" for v in values[i]]))
    text = draw(st.sampled_from(["\n", "\r\n"])).join(lines)
    if decimal_comma:
        text = text.replace(".", ",")
    encoding = draw(st.sampled_from(["utf-8", "utf-8-sig", "latin-1", "utf-16"]))
    data = text.encode(encoding, errors="replace")
    if draw(st.integers(0, 4)) == 0:
        data = data[: draw(st.integers(0, len(data)))]
    return data, {}


def _csv_property(data):
    _with_file(data, ".csv")


def _matrix_property(case):
    data, options = case
    _with_file(data, ".txt", **options)


test_exported_tables_load_or_raise_data_error, test_exported_tables_slow = _profiles(
    exported_tables(), _csv_property, 60, 3000)
test_exported_matrices_load_or_raise_data_error, test_exported_matrices_slow = _profiles(
    exported_matrices(), _matrix_property, 40, 2000)


# ----------------------------------------------------------------------------------------
# binary files cut short
# ----------------------------------------------------------------------------------------
def _netcdf_map() -> bytes:
    da = make_map(np.random.default_rng(0).uniform(0, 100, (7, 40)),
                  angle=np.linspace(-9, 9, 7), energy=np.linspace(1.50, 1.56, 40),
                  units="counts", kind="emission", sample="invented")
    return bytes(da.to_dataset(name="signal").to_netcdf(engine="h5netcdf"))


def _netcdf_series() -> bytes:
    ds = xr.Dataset(
        {"intensity": ("power", np.linspace(1.0, 50.0, 12), {"units": "counts"}),
         "linewidth": ("power", np.linspace(0.9, 0.4, 12), {"units": "meV"})},
        coords={"power": ("power", np.linspace(0.1, 10.0, 12), {"units": "mW"})},
        attrs={"note": "invented"})
    return bytes(ds.to_netcdf(engine="h5netcdf"))


def _plain_hdf5() -> bytes:
    """An HDF5 file written without netCDF conventions (as some acquisition software does)."""
    buf = _io.BytesIO()
    with h5py.File(buf, "w") as fh:
        fh["angle"] = np.linspace(-9, 9, 7)
        fh["angle"].attrs["units"] = "degree"
        fh["wavelength"] = np.linspace(800.0, 820.0, 40)
        fh["wavelength"].attrs["units"] = "nm"
        fh["signal"] = np.random.default_rng(1).uniform(0, 100, (7, 40))
        fh["signal"].attrs["units"] = "counts"
        fh.attrs["note"] = "invented"
    return buf.getvalue()


def _npz_map() -> bytes:
    buf = _io.BytesIO()
    np.savez(buf, signal=np.ones((7, 40)), angle=np.linspace(-9, 9, 7),
             energy=np.linspace(1.50, 1.56, 40), units_signal="counts", units_angle="degree",
             units_energy="eV")
    return buf.getvalue()


BINARIES = {".nc": (_netcdf_map(), _netcdf_series()), ".h5": (_plain_hdf5(),),
            ".npz": (_npz_map(),)}


@st.composite
def cut_binaries(draw) -> tuple[bytes, str]:
    suffix = draw(st.sampled_from(sorted(BINARIES)))
    original = draw(st.sampled_from(BINARIES[suffix]))
    cut = draw(st.integers(0, len(original) - 1))
    data = original[:cut]
    if draw(st.integers(0, 3)) == 0:  # a partly reused block: garbage after the cut
        data += draw(st.binary(min_size=1, max_size=64))
    return data, suffix


def _binary_property(case):
    data, suffix = case
    _with_file(data, suffix)


test_cut_binaries_load_or_raise_data_error, test_cut_binaries_slow = _profiles(
    cut_binaries(), _binary_property, 60, 3000)


def test_uncut_binaries_load():
    # the originals are valid, so the cut cases above test the cutting, not a bad template
    for suffix, originals in BINARIES.items():
        for data in originals:
            with tempfile.TemporaryDirectory() as folder:
                path = Path(folder) / f"whole{suffix}"
                path.write_bytes(data)
                try:
                    validate_map(load_map(path))
                except DataError:
                    validate_series(load_series(path))


# ----------------------------------------------------------------------------------------
# the command line: one line naming the file and the problem
# ----------------------------------------------------------------------------------------
GOOD_SERIES = ("power [mW],intensity [counts],intensity_error [counts],sweep\n"
               + "".join(f"{p},{10 * p},1,up\n" for p in (1, 2, 3, 4))
               + "".join(f"{p},{10 * p},1,down\n" for p in (4, 3, 2, 1))).encode()
CAL_OK = ('drive = "cw"\nphoton_energy = {value = 1.54, units = "eV"}\n'
          'coupling_efficiency = {value = 0.3, units = "1"}\n'
          'spot_fwhm = {value = 3.0, units = "um"}\n')

# name -> (file content, command words before/after the file); FILE is replaced by its path
CLI_CASES = {
    "utf16_no_bom.csv": (GOOD_SERIES.decode().encode("utf-16-le"), ["inspect", "FILE"]),
    "decimal_comma.csv": (b"power [mW];intensity [counts]\n1,5;10\n2,5;20\n",
                          ["inspect", "FILE"]),
    "power_typo.csv": (b"power [mw],intensity [counts]\n1,10\n2,20\n3,30\n",
                       ["power", "FILE", "--model", "coherent"]),
    "latin1_typo.csv": ("power [µW],intensity [counts],temperature [°F]\n1,2,3\n"
                        .encode("latin-1"), ["inspect", "FILE"]),
    "cut.nc": (_netcdf_map()[:3000], ["dispersion", "FILE", "--peaks-only"]),
    "cut.h5": (_plain_hdf5()[:1500], ["inspect", "FILE"]),
    "noise.npz": (b"PK\x03\x04" + bytes(range(256)) * 3, ["dispersion", "FILE"]),
    "empty.txt": (b"", ["dispersion", "FILE"]),
    "angle_typo.txt": (b"# rows: wavelength [nm]; columns: angle [degre]; signal: x [counts]\n"
                       b"0 -1 0 1\n800 1 2 3\n801 2 3 4\n802 3 4 5\n",
                       ["dispersion", "FILE", "--peaks-only"]),
    "priors_unknown.toml": (b'[rabi_splitting]\nprior = "uniform"\nlow = 1\nhigh = 20\n'
                            b'units = "meV"\nmedian = 10\n',
                            ["dispersion", "MAP", "--priors", "FILE", "--peaks-only"]),
    "priors_nounits.toml": (b'[exciton_energy]\nprior = "normal"\nmu = 1.545\nsigma = 0.001\n',
                            ["dispersion", "MAP", "--priors", "FILE", "--peaks-only"]),
    "priors_sigma.toml": (b'[exciton_energy]\nprior = "normal"\nmu = 1.545\nsigma = -1\n'
                          b'units = "eV"\n',
                          ["dispersion", "MAP", "--priors", "FILE", "--peaks-only"]),
    "cal_unknown.toml": (CAL_OK.encode() + b'spot_diameter = {value = 3, units = "um"}\n',
                         ["power", "SERIES", "--model", "coherent", "--calibration", "FILE"]),
    "cal_nounits.toml": (CAL_OK.replace(', units = "eV"', "").encode(),
                         ["power", "SERIES", "--model", "coherent", "--calibration", "FILE"]),
    "cal_percent.toml": (CAL_OK.replace("0.3", "30").encode(),
                         ["power", "SERIES", "--model", "coherent", "--calibration", "FILE"]),
    "device_unknown.toml": (b'note = "x"\nspeed = {value = 1, units = "GHz"}\n',
                            ["budget", "--dispersion", "D", "--power", "P", "--device",
                             "FILE"]),
    "folder.csv": (None, ["inspect", "FILE"]),
    "missing.nc": (False, ["dispersion", "FILE"]),
}
# the key or field each refusal must name besides the file
CLI_MENTIONS = {"power_typo.csv": "mw", "decimal_comma.csv": "decimal comma",
                "angle_typo.txt": "degre", "priors_unknown.toml": "rabi_splitting.median",
                "priors_nounits.toml": "exciton_energy.units",
                "priors_sigma.toml": "exciton_energy.sigma", "cal_unknown.toml": "spot_diameter",
                "cal_nounits.toml": "photon_energy.units",
                "cal_percent.toml": "coupling_efficiency.value", "device_unknown.toml": "speed"}


@pytest.fixture(scope="module")
def small_map(tmp_path_factory) -> Path:
    from polkit.models.simulate import simulate_map

    ang, energy = np.linspace(-15, 15, 9), np.linspace(1.530, 1.556, 60)
    sim = simulate_map(ang, energy, e_c0=1.542, n_eff=3.4, e_x=1.545, g=0.005,
                       gamma_c=5e-4, gamma_x=8e-4, amplitudes=[1.0, 0.3], background=0.02)
    y = 1000 * sim.signal + np.random.default_rng(4).normal(0, 5, sim.signal.shape)
    path = tmp_path_factory.mktemp("cli") / "invented_map.nc"
    make_map(y, angle=ang, energy=energy, units="counts", kind="emission").to_netcdf(
        path, engine="h5netcdf")
    return path


@pytest.mark.parametrize("name", sorted(CLI_CASES))
def test_cli_refuses_bad_input_in_one_line(name, tmp_path, small_map, capsys):
    # common practice, no published source: a refusal is one line naming the file and the
    # problem, a non-zero exit status and no traceback (--debug shows it)
    content, words = CLI_CASES[name]
    path = tmp_path / name
    if content is None:
        path.mkdir()
    elif content is not False:
        path.write_bytes(content)
    series = tmp_path / "series.csv"
    series.write_bytes(GOOD_SERIES)
    subst = {"FILE": str(path), "MAP": str(small_map), "SERIES": str(series),
             "D": str(tmp_path / "no_dispersion"), "P": str(tmp_path / "no_power")}
    argv = [subst.get(w, w) for w in words] + (
        ["--out", str(tmp_path / "out"), "--quiet"] if words[0] in ("dispersion", "power")
        else ["--out", str(tmp_path / "out")])
    status = main(argv)
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert status != 0
    assert len(lines) == 1, err
    assert lines[0].startswith("polkit: error:") and name in lines[0], lines[0]
    assert "Traceback" not in err
    if name in CLI_MENTIONS:
        assert CLI_MENTIONS[name] in lines[0], lines[0]
    assert not (tmp_path / "out" / "summary.json").exists(), "nothing written for bad input"


@pytest.mark.parametrize("command", ["power", "budget"])
def test_cli_refuses_a_calibration_or_device_file_that_is_not_utf8(command, tmp_path,
                                                                   capsys):
    # common practice, no published source: a file saved as latin-1 by an old editor
    bad = tmp_path / "latin1.toml"
    bad.write_bytes('drive = "cw"\nnote = "spot 3 µm"\n'.encode("latin-1"))
    series = tmp_path / "series.csv"
    series.write_bytes(GOOD_SERIES)
    if command == "power":
        argv = ["power", str(series), "--model", "coherent", "--calibration", str(bad),
                "--out", str(tmp_path / "o"), "--quiet"]
    else:
        argv = ["budget", "--dispersion", str(tmp_path), "--power", str(tmp_path), "--device",
                str(bad), "--out", str(tmp_path / "o")]
    status = main(argv)
    err = capsys.readouterr().err
    assert status == 2 and err.count("\n") == 1 and "latin1.toml" in err


# ----------------------------------------------------------------------------------------
# priors, calibration and device files: strict, with the key named
# ----------------------------------------------------------------------------------------
SPACE = ParameterSpace([
    Parameter("exciton_energy", "eV", Prior.uniform(1.50, 1.60)),
    Parameter("rabi_splitting", "meV", Prior.uniform(0.0, 30.0)),
    Parameter("cavity_linewidth", "meV", Prior.loguniform(1e-3, 5.0)),
])

PRIOR_FILES = {  # TOML text -> key the refusal must name
    '[rabi_spliting]\nprior = "uniform"\nlow = 1\nhigh = 2\nunits = "meV"\n': "rabi_spliting",
    '[rabi_splitting]\nprior = "uniform"\nlow = 1\nhigh = 2\nunits = "meV"\nmu = 1\n':
        "rabi_splitting.mu",
    '[rabi_splitting]\nprior = "uniform"\nlow = 1\nhigh = 2\n': "rabi_splitting.units",
    '[rabi_splitting]\nprior = "uniform"\nlow = 1\nhigh = 2\nunits = "eV"\n':
        "rabi_splitting.units",
    '[rabi_splitting]\nprior = "uniform"\nlow = 2\nhigh = 1\nunits = "meV"\n':
        "rabi_splitting.low",
    '[rabi_splitting]\nprior = "flat"\nlow = 1\nhigh = 2\nunits = "meV"\n':
        "rabi_splitting.prior",
    '[cavity_linewidth]\nprior = "loguniform"\nlow = 0\nhigh = 2\nunits = "meV"\n':
        "cavity_linewidth.low",
    '[exciton_energy]\nprior = "normal"\nmu = 1.55\nsigma = 0\nunits = "eV"\n':
        "exciton_energy.sigma",
    '[exciton_energy]\nprior = "normal"\nmu = nan\nsigma = 0.01\nunits = "eV"\n':
        "exciton_energy.mu",
    '[exciton_energy]\nprior = "normal"\nmu = "1.55"\nsigma = 0.01\nunits = "eV"\n':
        "exciton_energy.mu",
    '[exciton_energy]\nprior = "truncnormal"\nmu = 1.55\nsigma = 0.01\nlow = 1.6\n'
    'high = 1.6\nunits = "eV"\n': "exciton_energy.low",
    "rabi_splitting = 12.0\n": "rabi_splitting",
}
PRIOR_INFINITE = {  # infinite numbers and overflowing widths: not a proper density
    '[exciton_energy]\nprior = "normal"\nmu = inf\nsigma = 0.01\nunits = "eV"\n':
        "exciton_energy.mu",
    '[exciton_energy]\nprior = "normal"\nmu = 1.55\nsigma = inf\nunits = "eV"\n':
        "exciton_energy.sigma",
    '[rabi_splitting]\nprior = "uniform"\nlow = -1e308\nhigh = 1e308\nunits = "meV"\n':
        "rabi_splitting.low",
}


@pytest.mark.parametrize("text", sorted(PRIOR_FILES))
def test_prior_files_are_refused_with_the_key_named(text, tmp_path):
    # common practice, no published source
    path = tmp_path / "priors.toml"
    path.write_text(text)
    with pytest.raises(ConfigError) as info:
        apply_priors(SPACE, path)
    assert info.value.key == PRIOR_FILES[text]
    assert str(info.value).startswith(f"{path}: key '{PRIOR_FILES[text]}'")


@pytest.mark.parametrize("text", sorted(PRIOR_INFINITE))
def test_infinite_prior_numbers_are_refused_with_the_key_named(text, tmp_path):
    # common practice, no published source: a prior must be a proper, finite density
    path = tmp_path / "priors.toml"
    path.write_text(text)
    with pytest.raises(ConfigError) as info:
        apply_priors(SPACE, path)
    assert info.value.key == PRIOR_INFINITE[text]


CAL = {"drive": "cw", "photon_energy": {"value": 1.54, "units": "eV"},
       "coupling_efficiency": {"value": 0.3, "rel_error": 0.2, "units": "1"},
       "spot_fwhm": {"value": 3.0, "error": 0.3, "units": "um"}}
DEVICE = {"node_size": {"value": 3.0, "error": 0.3, "units": "um"},
          "coupling_efficiency": {"value": 0.3, "rel_error": 0.3, "units": "1"},
          "temperature": {"value": 4.0, "units": "K"},
          "array": {"nodes": 16, "inputs": 4, "outputs": 4},
          "modulator_energy": {"value": 50.0, "rel_error": 0.5, "units": "fJ"},
          "detector_energy": {"value": 20.0, "rel_error": 0.5, "units": "fJ"}}


def _edit(base: dict, path: str, value) -> dict:
    """A deep copy of ``base`` with ``path`` ("a.b") set to ``value`` (DELETE removes it)."""
    import copy

    out = copy.deepcopy(base)
    *parents, last = path.split(".")
    node = out
    for p in parents:
        node = node[p]
    if value is DELETE:
        del node[last]
    else:
        node[last] = value
    return out


DELETE = object()
CAL_EDITS = [("spot_fwhm.units", DELETE, "spot_fwhm.units"),
             ("spot_fwhm.units", "inch", "spot_fwhm.units"),
             ("spot_fwhm.value", -3.0, "spot_fwhm.value"),
             ("spot_fwhm.sigma", 0.1, "spot_fwhm.sigma"),
             ("coupling_efficiency.value", 1.5, "coupling_efficiency.value"),
             ("coupling_efficiency.error", 0.1, "coupling_efficiency.error"),
             ("photon_energy.value", float("inf"), "photon_energy.value"),
             ("photon_energy.value", "1.54", "photon_energy.value"),
             ("spot_radius", {"value": 1.0, "units": "um"}, "spot_radius"),
             ("drive", "pulse", "drive")]
DEVICE_EDITS = [("node_size.units", DELETE, "node_size.units"),
                ("node_size.value", 0.0, "node_size.value"),
                ("coupling_efficiency.value", 2.0, "coupling_efficiency.value"),
                ("temperature.units", "C", "temperature.units"),
                ("array.nodes", 0, "array.nodes"),
                ("array.nodes", 2.5, "array.nodes"),
                ("array.cores", 4, "array.cores"),
                ("modulator_energy.rel_error", -0.1, "modulator_energy.rel_error"),
                ("clock", {"value": 1.0, "units": "GHz"}, "clock")]


@pytest.mark.parametrize(("loader", "base", "edit"),
                         [(load_calibration, CAL, e) for e in CAL_EDITS]
                         + [(load_device, DEVICE, e) for e in DEVICE_EDITS],
                         ids=lambda v: getattr(v, "__name__", None) if callable(v) else None)
def test_calibration_and_device_files_are_refused_with_the_key_named(loader, base, edit,
                                                                     tmp_path):
    # common practice, no published source; the unedited files load (checked first)
    loader(base)
    key, value, named = edit
    with pytest.raises(ConfigError) as info:
        loader(_edit(base, key, value))
    assert info.value.key == named and f"key '{named}'" in str(info.value)


_toml_scalars = st.one_of(st.floats(), st.integers(-10**6, 10**6), st.booleans(),
                          st.text(max_size=8), st.sampled_from(["eV", "meV", "um", "1", "K"]))
_toml_tables = st.dictionaries(
    st.sampled_from(["value", "error", "rel_error", "units", "prior", "low", "high", "mu",
                     "sigma", "nodes", "inputs", "outputs", "x"]),
    _toml_scalars, max_size=6)
_config_dicts = st.dictionaries(
    st.sampled_from(["drive", "note", "photon_energy", "coupling_efficiency", "spot_fwhm",
                     "spot_area", "node_size", "node_area", "temperature", "array",
                     "modulator_energy", "detector_energy", "exciton_energy",
                     "rabi_splitting", "cavity_linewidth", "misc"]),
    st.one_of(_toml_scalars, _toml_tables), max_size=8)


def _config_property(raw):
    for load in (load_calibration, load_device, lambda d: apply_priors(SPACE, d)):
        with hang_guard():
            try:
                load(raw)
            except ConfigError as err:
                assert err.key is None or f"key '{err.key}'" in str(err), err


test_config_dicts_load_or_raise_config_error, test_config_dicts_slow = _profiles(
    _config_dicts, _config_property, 150, 5000)


# ----------------------------------------------------------------------------------------
# nothing unpickles, nothing evaluates text
# ----------------------------------------------------------------------------------------
FORBIDDEN = {
    "unpickling": re.compile(r"\b(?:c?pickle|dill|cloudpickle|joblib|shelve|marshal)\.(?:loads?"
                             r"|Unpickler|open)\b|\bread_pickle\("),
    "pickle allowed": re.compile(r"allow_pickle\s*=\s*True"),
    "eval/exec": re.compile(r"(?<![\w.])(?:eval|exec)\s*\("),
    "unsafe YAML": re.compile(r"\byaml\.(?:unsafe_)?load(?:_all)?\s*\("),
}


def _calls(pattern: re.Pattern, text: str) -> list[str]:
    return [ln.strip() for ln in text.splitlines() if pattern.search(ln)]


def test_the_forbidden_patterns_are_recognised():
    # the check below can fail: each pattern catches its example and spares safe look-alikes
    for bad in ("data = pickle.load(fh)", "np.load(p, allow_pickle = True)", "x = eval(text)",
                "exec(code, {})", "cfg = yaml.load(fh)", "obj = marshal.loads(b)"):
        assert any(_calls(p, bad) for p in FORBIDDEN.values()), bad
    for safe in ("ast.literal_eval(node)", "model.eval()", "np.load(p, allow_pickle=False)",
                 "yaml.safe_load(fh)", "evaluate(x)"):
        assert not any(_calls(p, safe) for p in FORBIDDEN.values()), safe


def test_no_module_unpickles_or_evaluates_text():
    # common practice, no published source: reading a file must never run code from it
    found = []
    for source in sorted(PACKAGE.rglob("*.py")):
        text = source.read_text(encoding="utf-8")
        for what, pattern in FORBIDDEN.items():
            found += [f"{source.relative_to(PACKAGE.parent)}: {what}: {line}"
                      for line in _calls(pattern, text)]
        for line in _calls(re.compile(r"\b(?:np|numpy)\.load\("), text):
            if "allow_pickle=False" not in line:
                found.append(f"{source.relative_to(PACKAGE.parent)}: np.load without "
                             f"allow_pickle=False: {line}")
    assert not found, "\n".join(found)
