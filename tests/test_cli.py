"""The command line's own logic, without a daemon: value parsing, name checks, settings files,
timeouts, the progress line, and where a client finds its daemon."""

from __future__ import annotations

import io
import json
import math
from pathlib import Path

import pytest

from meshwarden.cli import build_parser
from meshwarden.cli_common import UsageError, endpoints, open_client
from meshwarden.cli_progress import Progress
from meshwarden.cli_tables import render
from meshwarden.cli_values import parse_pairs, resolve_names, values_from_document
from meshwarden.client import Client
from meshwarden.errors import MeshwardenError, UnknownTargetRefused

VIEW = {
    "actuators": {
        "c05": {"kind": "coupler", "volts": 10.0, "value": 0.2},
        "p05": {"kind": "phase", "volts": 5.0, "value": 1.0},
        "c06": {"kind": "coupler", "volts": 0.0, "value": None},
    },
    "gates": {"g05": {"coupler": "c05", "phase": "p05"}},
}


def test_units_are_converted() -> None:
    """'90 deg' is pi/2 rad (Source: the SI definition of the degree, pi/180 rad); '1.2 rad' stays;
    '12 V' and '12000 mV' are volts."""
    values, volts, angled = parse_pairs(["p05=90 deg", "g05.phase=1.2 rad"])
    assert values["p05"] == pytest.approx(math.pi / 2) and values["g05.phase"] == 1.2
    assert volts is False and angled == {"p05", "g05.phase"}
    values, volts, _ = parse_pairs(["c05=12 V", "c06=12000mV"])
    assert values == {"c05": 12.0, "c06": pytest.approx(12.0)} and volts is True
    assert parse_pairs(["c05=12"], volts_flag=True)[1] is True


@pytest.mark.parametrize(
    ("pairs", "message"),
    [
        (["c05=0.1", "c05=0.2"], "set: 'c05' is given twice in one request"),
        (["c05=12 V", "p05=1.0"], "one request is either all volts or all logical values"),
        (["c05=nan"], "is not a value an output can take (NaN or infinity)"),
        (["c05=inf"], "is not a value an output can take (NaN or infinity)"),
        (["c05=3 furlongs"], "unknown unit 'furlongs'"),
        (["c05"], "expected ID=VALUE"),
        (["c05=high"], "is not a number with an optional unit"),
    ],
)
def test_bad_values_are_refused_before_sending(pairs: list[str], message: str) -> None:
    """A name twice, mixed volts and logical values, NaN/inf, unknown units and non-numbers are
    usage errors with the reason."""
    with pytest.raises(UsageError, match=message.replace("(", r"\(").replace(")", r"\)")):
        parse_pairs(pairs)


def test_names_resolve_through_gates_and_typos_get_a_suggestion() -> None:
    """Gate attributes map to their actuators; a typo names the closest id; an actuator and its
    gate attribute together are refused; an angle on a coupler is refused."""
    assert resolve_names({"g05.kappa": 0.3, "p05": 1.0}, VIEW) == {"g05.kappa": "c05", "p05": "p05"}
    with pytest.raises(UnknownTargetRefused, match=r"unknown target 'g05.kapa' \(did you mean 'g05.kappa'\?\)"):
        resolve_names({"g05.kapa": 0.3}, VIEW)
    with pytest.raises(UsageError, match=r"'g05\.phase' and 'p05' both set actuator p05"):
        resolve_names({"g05.phase": 1.0, "p05": 1.0}, VIEW)
    with pytest.raises(UsageError, match="c05 is a coupler"):
        resolve_names({"c05": 0.5}, VIEW, angled={"c05"})


def test_get_json_output_feeds_set_from_file() -> None:
    """A `get --json` reply gives logical values when every actuator has one, else volts."""
    with_values = {"actuators": {"c05": {"volts": 10.0, "value": 0.2}, "p05": {"volts": 5.0, "value": 1.0}}}
    assert values_from_document(with_values, False) == ({"c05": 0.2, "p05": 1.0}, False)
    assert values_from_document(with_values, True) == ({"c05": 10.0, "p05": 5.0}, True)
    assert values_from_document(VIEW, False) == ({"c05": 10.0, "p05": 5.0, "c06": 0.0}, True)
    assert values_from_document({"c05": 0.3}, False) == ({"c05": 0.3}, False)
    with pytest.raises(UsageError):
        values_from_document([1, 2], False)


def test_timeout_is_shared_by_the_tries() -> None:
    """--timeout 1.5 with 2 retries gives 0.5 s per try: an absent daemon is reported within 1.5 s."""
    args = build_parser().parse_args(["status", "--endpoint", "tcp://127.0.0.1:9", "--timeout", "1.5"])
    with open_client(args) as client:
        assert client.timeout_s * (client.retries + 1) == pytest.approx(1.5)
    bad = build_parser().parse_args(["status", "--timeout", "nan"])
    with pytest.raises(UsageError):
        open_client(bad)


def test_endpoint_order(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """--endpoint beats MESHWARDEN_ENDPOINT, which beats the user file, which beats the default."""
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path))
    monkeypatch.delenv("MESHWARDEN_ENDPOINT", raising=False)
    parse = build_parser().parse_args
    assert endpoints(parse(["status"]))[0] == "tcp://127.0.0.1:7640"
    (tmp_path / "meshwarden").mkdir()
    (tmp_path / "meshwarden" / "client.yaml").write_text("endpoint: tcp://10.0.0.5:7000\n", encoding="utf-8")
    assert endpoints(parse(["status"]))[0] == "tcp://10.0.0.5:7000"
    monkeypatch.setenv("MESHWARDEN_ENDPOINT", "tcp://127.0.0.1:7700")
    assert endpoints(parse(["status"])) == ("tcp://127.0.0.1:7700", None)
    assert endpoints(parse(["status", "--endpoint", "tcp://127.0.0.1:7800"]))[0] == "tcp://127.0.0.1:7800"


def test_client_refuses_nan_with_a_reason() -> None:
    """NaN reaching the client is a MeshwardenError naming the operation, not a ValueError."""
    with Client("tcp://127.0.0.1:9", timeout_s=0.1, retries=0) as client, pytest.raises(MeshwardenError) as err:
        client.set({"c0": math.nan})
    assert err.value.code == "bad_request" and "NaN" in err.value.message


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def test_progress_draws_on_a_terminal_only() -> None:
    """The bar rewrites one line on a terminal and writes nothing to a pipe or file."""
    plain = io.StringIO()
    bar = Progress("job-1", plain)
    bar.update(5, 10)
    bar.close()
    assert plain.getvalue() == ""
    tty = _Terminal()
    bar = Progress("job-1", tty)
    bar.update(5, 10)
    bar.update(10, 10)
    bar.close()
    text = tty.getvalue()
    assert text.startswith("\rjob-1 [" + "#" * 15 + "." * 15 + "]  50%  5/10") and text.endswith("\n")
    assert "100%  10/10" in text


def test_get_table_is_grouped_by_gate_and_shows_targets() -> None:
    """`get` lists each gate's coupler and phase under the gate, then the rest; value and target apart."""
    actuator = {"board": "b0", "channel": 0, "code": 0, "limit_v": 40.0}
    result = {
        "armed": False,
        "estopped": False,
        "gates": VIEW["gates"],
        "actuators": {
            "c05": {
                **actuator,
                "kind": "coupler",
                "volts": 0.0,
                "value": None,
                "target": {"value": 0.5, "volts": 36.8},
            },
            "p05": {**actuator, "kind": "phase", "volts": 0.0, "value": None, "target": None},
            "c06": {**actuator, "kind": "coupler", "volts": 0.0, "value": None, "target": None},
        },
    }
    lines = render("get", result).splitlines()
    assert lines[2] == "g05" and lines[3].split()[0] == "c05" and lines[4].split()[0] == "p05"
    assert lines[5] == "(in no gate)" and lines[6].split()[0] == "c06"
    assert lines[3].rstrip().endswith("-           0.5 (36.800 V)")


def test_json_renders_for_every_readable_table() -> None:
    """Arm/disarm replies print as a table, not as a Python dict."""
    state = {"armed": True, "estopped": False, "boards": {"b0": {"boot_count": 1, "faulted": False}}}
    text = render("arm", state)
    assert "{" not in text and "b0" in text and json.dumps(state) not in text
