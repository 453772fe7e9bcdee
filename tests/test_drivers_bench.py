"""Bench file validation, dialect loading errors, open_bench clean-up and `benchctl discover`."""

from __future__ import annotations

import io
import json
import socket
from pathlib import Path

import pytest
from rich.console import Console
from test_drivers_transport import ScriptServer  # sibling test module

from benchctl.cli import main
from benchctl.drivers import (
    load_bench_file,
    load_bench_text,
    load_dialect,
    open_bench,
    shipped_dialects,
)
from benchctl.drivers.dialect import OPERATIONS
from benchctl.errors import ConfigErrors, ConnectionLost

GOOD = """
[bench]
name = "sim-bench"
visa_library = "@py"

[roles.supply]
resource = "TCPIP::127.0.0.1::5025::SOCKET"
dialect = "scpi1999"
timeout_s = 2.0
channel = 1

[roles.generator]
resource = "TCPIP::127.0.0.1::5026::SOCKET"
dialect = "simbench"

[roles.scope]
resource = "TCPIP::127.0.0.1::5027::SOCKET"

[wiring]
output_channel = 1
rail_channel = 2
generator = "rail"
"""


def test_good_bench_file(tmp_path: Path) -> None:
    path = tmp_path / "bench.toml"
    path.write_text(GOOD, encoding="utf-8")
    cfg = load_bench_file(path)
    assert cfg.name == "sim-bench" and cfg.visa_library == "@py"
    assert cfg.roles["supply"].channel == 1 and cfg.roles["supply"].timeout_s == 2.0
    assert cfg.roles["generator"].dialect.name == "simbench"
    assert cfg.roles["scope"].dialect.name == "scpi1999"  # the default
    assert (cfg.wiring.output_channel, cfg.wiring.rail_channel, cfg.wiring.generator) == (1, 2, "rail")


def test_every_problem_is_reported_at_once(tmp_path: Path) -> None:
    bad = (
        GOOD.replace('name = "sim-bench"', 'name = "sim-bench"\ncolour = "red"')
        .replace("TCPIP::127.0.0.1::5026::SOCKET", "127.0.0.1:5026")
        .replace("timeout_s = 2.0", "timeout_s = -1")
        .replace('generator = "rail"', 'generator = "antenna"')
        .replace('dialect = "simbench"', 'dialect = "no-such-dialect"')
    )
    path = tmp_path / "bench.toml"
    path.write_text(bad, encoding="utf-8")
    with pytest.raises(ConfigErrors) as info:
        load_bench_file(path)
    keys = {e.key for e in info.value.errors if e.file == str(path)}
    assert {
        "bench.colour",
        "roles.generator.resource",
        "roles.supply.timeout_s",
        "wiring.generator",
        "roles.generator.dialect",
    } <= keys
    text = str(info.value)
    assert "'127.0.0.1:5026'" in text and "no-such-dialect" in text and "'antenna'" in text


def test_missing_role_and_bad_toml() -> None:
    with pytest.raises(ConfigErrors) as info:
        load_bench_text(GOOD.split("[roles.scope]")[0])
    assert [e.key for e in info.value.errors] == ["roles.scope"]
    with pytest.raises(ConfigErrors, match="not valid TOML"):
        load_bench_text("[bench\nname = 1")


def test_broken_dialect_is_a_config_error_at_validation(tmp_path: Path) -> None:
    dialect = tmp_path / "mine.toml"
    # extends the standard one but a template takes a placeholder the operation does not have
    dialect.write_text(
        '[dialect]\nextends = "scpi1999"\n[supply]\nset_voltage = { write = "VOLT {current_a}" }\n',
        encoding="utf-8",
    )
    bench = tmp_path / "bench.toml"
    bench.write_text(GOOD.replace('dialect = "scpi1999"', 'dialect = "mine.toml"'), encoding="utf-8")
    with pytest.raises(ConfigErrors) as info:
        load_bench_file(bench)
    pairs = {(e.file, e.key) for e in info.value.errors}
    assert (str(bench), "roles.supply.dialect") in pairs
    assert (str(dialect), "supply.set_voltage.write") in pairs
    assert any("{current_a}" in e.reason and "{voltage_v}" in e.reason for e in info.value.errors)


def test_dialect_extends_and_overrides(tmp_path: Path) -> None:
    path = tmp_path / "mine.toml"
    path.write_text(
        '[dialect]\nextends = "scpi1999"\nname = "mine"\ntrue = "1"\nfalse = "0"\n'
        '[scope.words.slope]\nrising = "POS"\n',
        encoding="utf-8",
    )
    d = load_dialect(path, "scope")
    assert d.name == "mine"
    assert d.op("set_trigger_slope").render(slope="rising") == "TRIGger:SEQuence:SLOPe POS"
    assert d.op("set_trigger_slope").render(slope="falling") == "TRIGger:SEQuence:SLOPe NEGative"
    assert d.op("channel_state").render(channel=2, state=True) == "INPut2:STATe 1"


def test_circular_extends_and_unknown_operation(tmp_path: Path) -> None:
    a, b = tmp_path / "a.toml", tmp_path / "b.toml"
    a.write_text('[dialect]\nextends = "b.toml"\n', encoding="utf-8")
    b.write_text('[dialect]\nextends = "a.toml"\n', encoding="utf-8")
    with pytest.raises(ConfigErrors, match="circular"):
        load_dialect(a, "supply")
    c = tmp_path / "c.toml"
    c.write_text('[dialect]\nextends = "scpi1999"\n[supply]\nteleport = { write = "X" }\n', encoding="utf-8")
    with pytest.raises(ConfigErrors) as info:
        load_dialect(c, "supply")
    assert [(e.key, e.reason) for e in info.value.errors] == [("supply.teleport", "unknown operation")]


@pytest.mark.parametrize("name", sorted(shipped_dialects()))
@pytest.mark.parametrize("role", sorted(OPERATIONS))
def test_shipped_dialects_define_every_needed_operation(name: str, role: str) -> None:
    d = load_dialect(name, role)
    needed = {op for op, spec in OPERATIONS[role].items() if spec.needed}
    assert needed <= set(d.operations)


def test_dialect_numbers_follow_scpi_response_rules() -> None:
    op = load_dialect("scpi1999", "supply").op("measure_voltage")
    # NR1/NR2/NR3 forms (IEEE 488.2-1992, 8.7.2-8.7.4, from memory)
    assert op.parse("5") == 5.0 and op.parse("+5.000") == 5.0 and op.parse("5.00E+00") == 5.0
    # SCPI-1999 vol. 1, 7.2.1.5: 9.91E37 = NaN, 9.9E37 = +infinity (from memory)
    assert op.parse("9.91E37") != op.parse("9.91E37")
    assert op.parse("9.9E37") == float("inf") and op.parse("-9.9E37") == float("-inf")
    err = load_dialect("scpi1999", "supply").op("error")
    assert err.parse('-222,"Data out of range;VOLT 9"') == (-222, "Data out of range;VOLT 9")
    assert err.parse('0,"No error"') == (0, "No error")


def _idn_and_errors(line: bytes, i: int) -> bytes | None:
    if line.strip() == b"*IDN?":
        return b"Testworks,SCRIPT,0001,1.0\n"
    if line.strip() == b"SYSTem:ERRor:NEXT?":
        return b'0,"No error"\n'
    return None


def test_open_bench_closes_what_it_opened_when_a_role_fails() -> None:
    with ScriptServer(_idn_and_errors) as ok:
        refused = socket.create_server(("127.0.0.1", 0))
        dead_port = refused.getsockname()[1]
        refused.close()
        text = f"""
[roles.supply]
resource = "{ok.resource}"
timeout_s = 0.5
[roles.generator]
resource = "{ok.resource}"
timeout_s = 0.5
[roles.scope]
resource = "TCPIP::127.0.0.1::{dead_port}::SOCKET"
timeout_s = 0.5
"""
        cfg = load_bench_text(text)
        made = []

        def opener(*args, **kwargs):
            from benchctl.drivers.transport import open_resource

            tr = open_resource(*args, **kwargs)
            made.append(tr)
            return tr

        with pytest.raises(ConnectionLost) as info:
            open_bench(cfg, max_voltage_v=6.0, opener=opener)
        assert any("scope" in note for note in getattr(info.value, "__notes__", []))
        assert len(made) in (2, 3) and all(tr.closed for tr in made)


def test_discover_json_with_explicit_resources() -> None:
    idn = b"Testworks,SCRIPT,0001,1.0\n"
    with ScriptServer(lambda line, i: idn if line.strip() == b"*IDN?" else None) as ok:
        with ScriptServer(lambda line, i: None) as mute:
            buf = io.StringIO()
            console = Console(file=buf, width=200, color_system=None)
            code = main(["discover", "--no-scan", "--json", "--timeout", "0.3", ok.resource, mute.resource], console)
    data = json.loads(buf.getvalue())
    rows = {r["resource"]: r for r in data["resources"]}
    assert code == 3  # one given resource did not answer
    assert rows[ok.resource]["ok"] is True
    assert (rows[ok.resource]["maker"], rows[ok.resource]["serial"]) == ("Testworks", "0001")
    assert rows[mute.resource]["ok"] is False and "no reply" in rows[mute.resource]["error"]
    assert rows[mute.resource]["elapsed_s"] < 2.0


def test_discover_table_and_bad_resource() -> None:
    idn = b"Testworks,SCRIPT,0001,1.0\n"
    with ScriptServer(lambda line, i: idn if line.strip() == b"*IDN?" else None) as ok:
        buf = io.StringIO()
        code = main(["discover", "--no-scan", ok.resource], Console(file=buf, width=200, color_system=None))
    assert code == 0
    assert "Testworks" in buf.getvalue() and "SCRIPT" in buf.getvalue()
    buf = io.StringIO()
    assert main(["discover", "--no-scan", "not-a::resource"], Console(file=buf, width=200)) == 2
    assert "not a VISA resource string" in buf.getvalue()


def test_dialect_format_comment_lists_the_catalogue() -> None:
    # The header comment of scpi1999.toml documents every operation, "*" marking the ones a
    # dialect must define; it must say what the code checks.
    import re

    from benchctl.drivers.dialect import DIALECT_DIR

    text = (DIALECT_DIR / "scpi1999.toml").read_text(encoding="utf-8")
    block = text.split("# Operations (* = every dialect for the role must define it):")[1].split("# ----")[0]
    sections: dict[str, str] = {}
    role = ""
    for line in block.splitlines():
        m = re.match(r"#\s+(common|supply|generator|scope):(.*)", line)
        if m:
            role, line = m.group(1), m.group(2)
        sections[role] = sections.get(role, "") + " " + line.split("(")[0]
    for role, ops in OPERATIONS.items():
        documented = {
            name: star == "*"
            for name, star in re.findall(r"\b([a-z][a-z0-9_]+)(\*?)", sections["common"] + sections[role])
        }
        for op, spec in ops.items():
            assert op in documented, (role, op)
            # the two fetches are each optional but one of them is needed
            if op not in ("fetch_block", "fetch_ascii"):
                assert documented[op] == spec.needed, (role, op)
