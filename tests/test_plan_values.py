"""Example plans take the simulator's ports from the command line or the environment
(``${NAME}`` placeholders in ``[bench]``), and ``serve --port 0`` prints every port."""

from __future__ import annotations

import io
import threading
from pathlib import Path

import pytest

from noisebench.frontends import cli
from noisebench.running.plan import PlanError, load_plan
from noisebench.running.plan_values import expand_placeholders, parse_defines

EXAMPLES = Path(__file__).resolve().parents[1] / "examples"


def test_placeholders_take_defines_then_environment_then_default():
    data = {
        "bench": {
            "analyzer": {"resource": "TCPIP0::127.0.0.1::${PORT_A}::SOCKET"},
            "lo": {"resource": "TCPIP0::127.0.0.1::${PORT_B:-5028}::SOCKET"},
            "note": ["$${NOT_EXPANDED}"],
        },
        "name": "${ONLY_BENCH_IS_EXPANDED}",
    }
    out, problems = expand_placeholders(data, {"PORT_A": "40001"}, {"PORT_A": "1", "PORT_B": "2"})
    assert problems == []
    assert out["bench"]["analyzer"]["resource"] == "TCPIP0::127.0.0.1::40001::SOCKET"
    assert out["bench"]["lo"]["resource"] == "TCPIP0::127.0.0.1::2::SOCKET"  # environment
    assert out["bench"]["note"] == ["${NOT_EXPANDED}"]
    assert out["name"] == "${ONLY_BENCH_IS_EXPANDED}"
    out, problems = expand_placeholders(data, {}, {})
    assert out["bench"]["lo"]["resource"] == "TCPIP0::127.0.0.1::5028::SOCKET"  # the default
    assert problems == [
        "bench.analyzer.resource: ${PORT_A} is not set (give --define PORT_A=VALUE, set the "
        "environment variable PORT_A, or write a default: ${PORT_A:-VALUE})"
    ]


def test_defines_must_be_name_equals_value():
    assert parse_defines(["A=1", "B_2=x=y"]) == {"A": "1", "B_2": "x=y"}
    with pytest.raises(ValueError, match="'9X=1' is not NAME=VALUE"):
        parse_defines(["9X=1"])


@pytest.mark.parametrize(
    ("plan", "variables"),
    [
        ("yfactor_scpi_simulator.toml", {"analyzer": "NOISEBENCH_SIM_PORT"}),
        (
            "downconverter_scpi_simulator.toml",
            {"analyzer": "NOISEBENCH_SIM_PORT", "lo": "NOISEBENCH_SIM_LO_PORT"},
        ),
    ],
)
def test_example_plans_take_ports_from_defines_or_environment(plan, variables, monkeypatch):
    for name in variables.values():
        monkeypatch.delenv(name, raising=False)
    default = load_plan(EXAMPLES / plan)
    assert default.bench.analyzer.resource == "TCPIP0::127.0.0.1::5025::SOCKET"
    ports = {name: str(41000 + i) for i, name in enumerate(variables.values())}
    defined = load_plan(EXAMPLES / plan, defines=ports)
    for role, name in variables.items():
        section = getattr(defined.bench, role)
        assert section.resource == f"TCPIP0::127.0.0.1::{ports[name]}::SOCKET"
    monkeypatch.setenv("NOISEBENCH_SIM_PORT", "42000")
    assert load_plan(EXAMPLES / plan).bench.analyzer.resource.endswith("::42000::SOCKET")
    assert "5025" not in (EXAMPLES / plan).read_text().split("[bench]")[1].split("\n[")[0].replace(
        ":-5025}", ""
    )  # no hard-coded port left in the bench


def test_an_unset_placeholder_is_one_line_naming_the_key(tmp_path, capsys):
    plan = tmp_path / "p.toml"
    plan.write_text(
        'method = "y_factor"\n[bench]\n'
        'analyzer = { resource = "TCPIP0::127.0.0.1::${NB_TEST_UNSET_PORT}::SOCKET" }\n'
        "[sweep]\nfreqs_hz = [1e9]\n",
        encoding="utf-8",
    )
    with pytest.raises(PlanError, match=r"bench\.analyzer\.resource: \$\{NB_TEST_UNSET_PORT\}"):
        load_plan(plan)
    code = cli.main(["validate", str(plan)])
    err = capsys.readouterr().err
    assert code == cli.EXIT_INPUT and "${NB_TEST_UNSET_PORT} is not set" in err
    assert "Traceback" not in err
    code = cli.main(["validate", str(plan), "--define", "bad name"])
    err = capsys.readouterr().err
    assert code == cli.EXIT_INPUT and "--define: 'bad name' is not NAME=VALUE" in err


def test_serve_on_free_ports_prints_every_port_and_the_variables():
    from noisebench.sims import serve

    out = io.StringIO()
    stop = threading.Event()
    stop.set()
    assert serve.main(["--port", "0", "--duration", "0"], out=out, stop_event=stop) == 0
    text = out.getvalue()
    ports = {}
    for role in ("analyzer", "generator", "supply", "lo"):
        (line,) = [x for x in text.splitlines() if x.strip().startswith(role + " ")]
        ports[role] = int(line.split("::")[2])
    assert len(set(ports.values())) == 4 and all(p > 0 for p in ports.values())
    (export,) = [x for x in text.splitlines() if "export " in x]
    for role, name in serve.PORT_VARIABLES.items():
        assert f"{name}={ports[role]}" in export
