"""Security review: listeners on loopback only unless asked, hostile names kept out of paths,
HTML and SQL.

Hostile strings are the classic ones: a path that climbs out of the output folder, a script
element, an SQL quote that would end a literal, control characters and a very long name.
"""

from __future__ import annotations

import io
import json
import sqlite3
import threading
from pathlib import Path

import pytest
from _production import exact_sim, session_on, small_plan
from markupsafe import escape

from noisebench.errors import InputError, NoisebenchError
from noisebench.frontends import cli
from noisebench.sims import serve
from noisebench.sims.scpi_server import SimServer, is_loopback
from noisebench.user_files import safe_path_component

SCRIPT = "<script>alert('nb')</script>"
CLIMB = "../../escaped"
SQL = "x'); DROP TABLE runs; --"
HOSTILE_NAMES = [CLIMB, SCRIPT, SQL, "/abs/path", "..", "a\\b\\..\\..\\c", "é" * 300, "nul\x00x"]


# --------------------------------------------------------------------------- listeners


def test_the_simulator_listens_on_loopback_by_default():
    from noisebench.sims.bench import SimulatedBench

    server = SimServer(SimulatedBench.from_scenario("demo-lna", seed=1)).start()
    try:
        hosts = {sock.getsockname()[0] for sock in server._listeners.values()}
    finally:
        server.stop()
    assert hosts == {"127.0.0.1"}


def test_serve_defaults_to_loopback_and_prints_loopback_resources():
    out, stop = io.StringIO(), threading.Event()
    stop.set()  # serve, print the resources and stop at once
    code = serve.main(["--port", "0"], out=out, stop_event=stop)
    assert code == 0
    resources = [line.split()[-1] for line in out.getvalue().splitlines() if "::SOCKET" in line]
    # analyzer, generator, supply and the LO generator of a frequency-converting DUT
    assert len(resources) == 4 and all("::127.0.0.1::" in r for r in resources)


@pytest.mark.parametrize("host", ["0.0.0.0", "", "192.0.2.10", "example.org", "::"])
def test_a_non_loopback_address_needs_an_explicit_option(host, capsys):
    with pytest.raises(InputError, match="not a loopback address"):
        SimServer(object(), host=host)
    code = serve.main(["--host", host, "--port", "0"])
    err = capsys.readouterr().err
    assert code == 2
    assert "--allow-remote" in err and "no authentication" in err


def test_binding_elsewhere_on_purpose_prints_a_warning(capsys):
    def no_bench(scenario: str, seed: int):  # stop before any socket is opened
        raise NoisebenchError("stopped by the test")

    code = serve.main(
        ["--host", "192.0.2.10", "--allow-remote", "--port", "0"], bench_factory=no_bench
    )
    err = capsys.readouterr().err
    assert code == 2  # our bench factory refused; the warning came first
    assert err.startswith("warning: listening on 192.0.2.10, not on loopback")


@pytest.mark.parametrize(
    ("host", "loopback"),
    [("127.0.0.1", True), ("127.5.6.7", True), ("localhost", True), ("::1", True)]
    + [("0.0.0.0", False), ("10.0.0.5", False), ("", False), ("bench.local", False)],
)
def test_loopback_addresses_are_recognised(host, loopback):
    assert is_loopback(host) is loopback


# --------------------------------------------------------------------------- file paths


@pytest.mark.parametrize("name", HOSTILE_NAMES)
def test_a_hostile_name_becomes_one_harmless_path_component(name, tmp_path):
    part = safe_path_component(name)
    assert part and len(part) <= 64
    assert "/" not in part and "\\" not in part and "\x00" not in part
    assert part not in (".", "..") and not part.startswith(".")
    target = (tmp_path / f"20260101T000000Z_{part}").resolve()
    assert target.parent == tmp_path.resolve()


def _files_outside(root: Path, allowed: Path) -> list[Path]:
    return [p for p in root.rglob("*") if allowed not in p.parents and p != allowed]


def test_a_plan_with_hostile_names_writes_only_inside_its_output_folder(tmp_path, capsys):
    work = tmp_path / "work" / "deep"
    work.mkdir(parents=True)
    plan = {
        "method": "y_factor",
        "name": SCRIPT,
        "operator": SQL,
        "station": CLIMB,
        "dut": {"id": f"{CLIMB}/{SCRIPT}", "description": SCRIPT},
        "bench": {"analyzer": {"resource": "sim://demo-lna?seed=2", "compression_dbm": -3.0}},
        "acquisition": {"attenuation_db": 0, "target_u_nf_db": 0.2},
        "sweep": {"freqs_hz": [1e9, 2e9]},
        "expect": {"dut_gain_db": 20.0},
        "output": {"folder": "runs", "plots": False},
    }
    path = work / "plan.toml"
    path.write_text(_toml(plan), encoding="utf-8")
    code = cli.main(["run", str(path)])
    capsys.readouterr()
    assert code == 0
    runs = work / "runs"
    (folder,) = list(runs.iterdir())
    outside = sorted(_files_outside(tmp_path, runs))
    assert outside == [tmp_path / "work", work, path]  # nothing escaped
    html = (folder / "report.html").read_text(encoding="utf-8")
    assert "<script>" not in html  # escaped, never live
    assert str(escape(SCRIPT)) in html  # as the report's template engine escapes it
    info = json.loads((folder / "run.json").read_text(encoding="utf-8"))
    assert info["dut_id"] == f"{CLIMB}/{SCRIPT}"  # the data keep the name exactly


def _toml(data: dict, prefix: str = "") -> str:
    """A tiny TOML writer for the plan above (strings escaped with json.dumps)."""
    lines, tables = [], []
    for key, value in data.items():
        if isinstance(value, dict) and not prefix.startswith("inline"):
            tables.append((key, value))
        else:
            lines.append(f"{key} = {_value(value)}")
    for key, value in tables:
        lines.append(f"[{key}]")
        lines += [f"{k} = {_value(v)}" for k, v in value.items()]
    return "\n".join(lines) + "\n"


def _value(value) -> str:
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {_value(v)}" for k, v in value.items()) + " }"
    if isinstance(value, list):
        return "[" + ", ".join(_value(v) for v in value) + "]"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)
    return repr(value)


def test_a_station_unit_with_a_hostile_serial_stays_in_the_station_folder(tmp_path):
    from noisebench.frontends.station import Station, StationSettings, UnitId
    from noisebench.results.database import ResultsDatabase

    plan = small_plan(tmp_path)
    settings = StationSettings(
        station_id="bench-1",
        operator=SCRIPT,
        folder=tmp_path / "station",
        unit_variation=None,
    )
    units = [UnitId(CLIMB, lot=SQL, part_number=SCRIPT), UnitId(SQL)]
    with Station(plan, settings, session=session_on(exact_sim(), plan), say=lambda _: None) as st:
        summary = st.run(units)
    assert [u.serial for u in summary.units] == [CLIMB, SQL]
    station = tmp_path / "station"
    assert _files_outside(tmp_path, station) == []
    folders = sorted(p.name for p in (station / "units").iterdir())
    assert len(folders) == 2 and all("/" not in f and not f.startswith(".") for f in folders)
    for folder in (station / "units").iterdir():
        html = (folder / "report.html").read_text(encoding="utf-8")
        assert "<script>" not in html and "&lt;script&gt;" in html
    # bound parameters: the quotes went into the database as data, and every table survived
    with ResultsDatabase(station / "station.sqlite", create=False) as db:
        assert db.count("runs") == 2 and db.count("units") == 2
        assert len(db.unit_history(SQL)) == 1 and len(db.unit_history(CLIMB)) == 1
    with sqlite3.connect(station / "station.sqlite") as con:
        tables = {r[0] for r in con.execute("select name from sqlite_master where type='table'")}
        lots = sorted(r[0] or "" for r in con.execute("select lot from units"))
    assert {"runs", "units", "points"} <= tables and lots == ["", SQL]


PACKAGE = Path(__file__).resolve().parent.parent / "noisebench"


def test_no_module_formats_sql_text():
    """Bound parameters only: no f-string or %-formatting reaches ``text()``/``execute`` in any
    module that talks to a database."""
    import re

    talking = [
        p for p in PACKAGE.rglob("*.py") if re.search(r"sqlalchemy|sqlite3|psycopg", p.read_text())
    ]
    assert any(p.name == "database.py" for p in talking)
    for path in talking:
        source = path.read_text(encoding="utf-8")
        for pattern in (r"text\(\s*f[\"']", r"exec_driver_sql\(\s*f[\"']", r"execute\(\s*f[\"']"):
            assert not re.search(pattern, source), f"{path.name}: formatted SQL ({pattern})"
        assert not re.search(r"(SELECT|INSERT|UPDATE|DELETE)[^\n]*[\"']\s*%\s*[(\w]", source)


def test_every_listener_is_the_reviewed_loopback_one():
    """A new socket listener must default to loopback and get a test here: this lists them."""
    import re

    listeners = sorted(
        str(p.relative_to(PACKAGE))
        for p in PACKAGE.rglob("*.py")
        if re.search(r"\.bind\(\(|HTTPServer|create_server\(|socketserver", p.read_text())
    )
    assert listeners == ["sims/scpi_server.py"]
