"""The analyzer's settings cache and compound lines (generic profile: error_check = "step",
compound = true), checked exchange by exchange with the scripted transport.

What a user relies on stays: every setting is read back once after it changes (once per
value: a centre the sweep returns to was read back when it was first sent, since the last
connect), an instrument error names the command that failed (also inside a compound line),
and after a reconnect everything is sent and read back again."""

from __future__ import annotations

import numpy as np
import pytest
from test_drivers_protocol import IDN, OK, REQUEST, REQUEST_COMMANDS, connect, readback

from noisebench.drivers import ScpiAnalyzer, load_profile
from noisebench.drivers.profile import parse_profile
from noisebench.drivers.protocol import RECOVER, ieee_block, replay_dialogue
from noisebench.drivers.scpi_channel import compound_line
from noisebench.drivers.transport import BlockError
from noisebench.errors import InstrumentError

GENERIC_TEXT = open(load_profile("generic").source, encoding="utf-8").read()
READ_LINE = '\nread = "READ?"\n'
# the start, wait and trace-query path: the generic profile without its single read query
# (tests/test_drivers_read_query.py covers the generic profile's READ? path)
STEP = parse_profile(GENERIC_TEXT.replace(READ_LINE, "\nread = false\n"), "generic_no_read.toml")
VALUES = np.linspace(-90.0, -80.0, 401, dtype=np.float32)
AT_2G = REQUEST.model_copy(update={"center_hz": 2e9})


def analyzer(transport):
    return ScpiAnalyzer(transport, STEP)


def configured(**replies: str) -> list:
    """Connect, send the whole request, read all back, one error read (the step)."""
    return (
        connect()
        + [(c, None) for c in REQUEST_COMMANDS]
        + readback(**replies)
        + [("SYST:ERR?", OK)]
    )


def first_acquisition() -> list:
    """The first start after connecting goes alone (its header not yet accepted)."""
    return [
        ("INIT:IMM", None),
        ("*WAI", None),  # accepted alone once before it rides in one-line acquisitions
        ("*OPC?", "1"),
        ("FORM REAL,32", None),
        ("FORM:BORD NORM", None),
        ("TRAC? TRACE1", ieee_block(VALUES)),
        ("SYST:ERR?", OK),
    ]


def block_then(text: str) -> bytes:
    """The reply to ``TRAC? TRACE1;:SYST:ERR?``: the block, ``;``, the error entry."""
    return ieee_block(VALUES)[:-1] + b";" + text.encode() + b"\n"


TRACE_AND_ERRORS = compound_line(["TRAC? TRACE1", "SYST:ERR?"])


def one_line(*held: str) -> str:
    """One acquisition, one program message: held settings, the start, the IEEE 488.2 wait,
    the trace query and the step's error query."""
    return compound_line([*held, "INIT:IMM", "*WAI", "TRAC? TRACE1", "SYST:ERR?"])


def compound_acquisition(*held: str) -> list:
    return [(one_line(*held), block_then(OK))]


def retune_read_back(center: str = "2000000000", reply: str = "2.0E+09") -> list:
    """A centre not read back yet: the command, its read-back and the error query in one
    line (all three headers accepted alone by the first configure)."""
    line = compound_line([f"FREQ:CENT {center}", "FREQ:CENT?", "FREQ:SPAN?", "SYST:ERR?"])
    return [(line, f"{reply};1.0E+07;{OK}")]


def warm() -> list:
    """Both centres verified, the start accepted, the analyzer left at 2 GHz."""
    return configured() + first_acquisition() + retune_read_back() + compound_acquisition()


# the generic profile's single query that starts, waits and fetches (SCPI-1999 READ?)
GENERIC = load_profile("generic")


def first_read() -> list:
    """With ``read = "READ?"`` the first acquisition after connecting sends it alone, its
    error read apart (a command error cannot hide in a compound line)."""
    return [
        ("FORM REAL,32", None),
        ("FORM:BORD NORM", None),
        ("READ?", ieee_block(VALUES)),
        ("SYST:ERR?", OK),
    ]


def read_line(*held: str, errors: bool = True) -> str:
    """One acquisition with READ?: held settings, the read query and the step's error query
    (``errors=False``: inside a step, left to the step's read)."""
    return compound_line([*held, "READ?", *(["SYST:ERR?"] if errors else [])])


def read_acquisition(*held: str) -> list:
    return [(read_line(*held), block_then(OK))]


def warm_read() -> list:
    """As :func:`warm`, with the generic profile's READ?."""
    return configured() + first_read() + retune_read_back() + read_acquisition()


def test_compound_line_roots_every_unit_after_the_first():
    # SCPI-1999 Vol. 1 §6.2.4 (from memory): after ';' a header continues the previous path
    # unless it starts with ':'; common commands ('*') stand alone
    assert compound_line(["FREQ:CENT 1E9", "INIT:IMM", "*OPC?"]) == "FREQ:CENT 1E9;:INIT:IMM;*OPC?"
    assert compound_line([":AVER:COUN 4"]) == ":AVER:COUN 4"


def test_a_centre_read_back_once_rides_with_the_start_when_the_sweep_returns_to_it():
    dialogue = warm() + compound_acquisition("FREQ:CENT 1000000000")
    with replay_dialogue(dialogue, analyzer) as sa:
        first = sa.configure(REQUEST)
        sa.acquire_trace()
        assert sa.configure(AT_2G).center_hz == 2e9
        sa.acquire_trace()
        back = sa.configure(REQUEST)  # no I/O: the centre's read-back is known
        trace = sa.acquire_trace()
    assert back == first  # the applied values read back when 1 GHz was first sent
    assert trace.settings.center_hz == 1e9 and trace.settings.span_hz == 1e7


def test_settings_held_twice_before_an_acquisition_go_out_once_with_the_last_value():
    more = REQUEST.model_copy(update={"averages": 20})
    dialogue = (
        warm()
        + [(compound_line(["AVER:COUN 20", "AVER:COUN?", "SYST:ERR?"]), f"20;{OK}")]  # 2 GHz
        + compound_acquisition("FREQ:CENT 1000000000", "AVER:COUN 10")
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.configure(AT_2G.model_copy(update={"averages": 20}))
        sa.configure(more)  # held: the centre
        sa.configure(AT_2G)  # the centre again, and the count back to 10
        sa.configure(REQUEST)  # the centre back to 1 GHz: one command for it
        assert sa.acquire_trace().settings.averages == 10


def test_a_new_average_count_is_read_back_once_then_known():
    more = REQUEST.model_copy(update={"averages": 20})
    dialogue = (
        warm()
        + [
            (
                compound_line(["FREQ:CENT 1000000000", "AVER:COUN 20", "AVER:COUN?", "SYST:ERR?"]),
                f"20;{OK}",
            )
        ]
        + compound_acquisition()
        # each setting's read-back is known per value: 2 GHz with the new count needs none
        + compound_acquisition("FREQ:CENT 2000000000")
        + compound_acquisition("FREQ:CENT 1000000000")
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        assert sa.configure(more).averages == 20
        sa.acquire_trace()
        sa.configure(AT_2G.model_copy(update={"averages": 20}))
        sa.acquire_trace()
        assert sa.configure(more).averages == 20
        sa.acquire_trace()


def test_after_a_reconnect_a_known_setting_is_sent_and_read_back_again():
    dialogue = (
        warm()
        + [
            (one_line("FREQ:CENT 1000000000"), BlockError("block incomplete")),
            (RECOVER, "reconnect"),
            ("*IDN?", IDN),
            ("SYST:ERR?", OK),
        ]
        # the instrument lost its settings (a reboot): read, recorded, all re-applied
        + readback(rbw="1.0E+06", center="5.0E+09")
        + [(c, None) for c in REQUEST_COMMANDS]
        + readback()
        + [("SYST:ERR?", OK)]
        + first_acquisition()  # the start goes alone again, the format is sent again
        # 2 GHz was read back before the reconnect: not trusted now; the first configure
        # after a reconnect sends every setting and reads every one back
        + [(c.replace("CENT 1000000000", "CENT 2000000000"), None) for c in REQUEST_COMMANDS]
        + readback(center="2.0E+09")
        + [("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.configure(REQUEST)
        trace = sa.acquire_trace()
        assert sa.configure(AT_2G).center_hz == 2e9
    assert np.array_equal(trace.values, VALUES.astype(float))
    # the centre was held for the compound line when the connection broke: not a lost
    # setting; the RBW was
    assert sa.settings_changes == [{"rbw_hz": (100e3, 1e6)}]
    assert "reconnected" in sa.recovery_log[0]


def test_an_error_in_a_compound_line_names_the_failing_setting():
    line = one_line("FREQ:CENT 1000000000")
    dialogue = (
        warm()
        + [
            (line, block_then('-222,"Data out of range"')),
            ("SYST:ERR?", OK),  # the rest of the queue
            # each setting of the line alone, the queue read after it
            ("FREQ:CENT 1000000000", None),
            ("SYST:ERR?", '-222,"Data out of range"'),
            ("SYST:ERR?", OK),
        ]
        # the state is unknown now: the next configure sends and reads back everything
        + [(c, None) for c in REQUEST_COMMANDS]
        + readback()
        + [("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.configure(REQUEST)
        with pytest.raises(InstrumentError) as info:
            sa.acquire_trace()
        sa.configure(REQUEST)
    error = info.value
    assert error.code == -222 and error.command == "FREQ:CENT 1000000000"
    assert error.context["in_compound"] == "TRAC? TRACE1"
    assert line in error.context["commands_since_last_check"]
    assert "FREQ:CENT 1000000000" in str(error)


def test_an_error_no_setting_repeats_names_the_step_and_lists_the_compound_line():
    line = one_line("FREQ:CENT 1000000000")
    dialogue = warm() + [
        (line, block_then('-230,"Data corrupt or stale"')),
        ("SYST:ERR?", OK),
        ("FREQ:CENT 1000000000", None),
        ("SYST:ERR?", OK),
    ]
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.configure(REQUEST)
        with pytest.raises(InstrumentError) as info:
            sa.acquire_trace()
    assert info.value.code == -230 and info.value.command == "TRAC? TRACE1"
    assert line in info.value.context["commands_since_last_check"]
    assert "in_compound" not in info.value.context


def test_a_failed_trace_query_answers_only_the_error_entry_and_is_named():
    # a query that fails sends no reply unit (IEEE 488.2), so the line's reply is the entry
    dialogue = warm() + [
        (one_line(), '-221,"Settings conflict"'),
        ("SYST:ERR?", OK),
    ]
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        with pytest.raises(InstrumentError) as info:
            sa.acquire_trace()
    assert info.value.code == -221 and info.value.command == "TRAC? TRACE1"


def test_a_refused_setting_in_a_read_back_line_is_named():
    line = compound_line(["FREQ:CENT 2000000000", "FREQ:CENT?", "FREQ:SPAN?", "SYST:ERR?"])
    dialogue = (
        configured()
        + first_acquisition()
        + [
            # the queries still answer (the old centre); the entry tells the set failed
            (line, '1.0E+09;1.0E+07;-222,"Data out of range;centre"'),
            ("SYST:ERR?", OK),
            ("FREQ:CENT 2000000000", None),
            ("SYST:ERR?", '-222,"Data out of range;centre"'),
            ("SYST:ERR?", OK),
        ]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        with pytest.raises(InstrumentError) as info:
            sa.configure(AT_2G)
        assert sa.settings is None
    assert info.value.code == -222 and info.value.command == "FREQ:CENT 2000000000"
    assert info.value.text == "Data out of range;centre"  # the ';' inside quotes kept


def test_held_settings_are_sent_and_checked_before_any_other_exchange():
    dialogue = warm() + [("FREQ:CENT 1000000000", None), ("SYST:ERR?", OK)] + readback()
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.configure(REQUEST)  # held
        assert sa.verify_settings() == {}  # the read-back sees the held centre applied


def test_one_acquisition_is_one_line_whose_deadline_covers_acquisition_and_transfer():
    # IEEE 488.2 *WAI (mandatory common command, §10.39, from memory): the units after it
    # run once the acquisition completed, so the trace and the error entry follow in the
    # same reply; the block's deadline is the acquisition's timeout plus the transfer's
    dialogue = warm() + compound_acquisition("FREQ:CENT 1000000000")
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        sa.acquire_trace()
        sa.configure(REQUEST)
        trace = sa.acquire_trace()
        limit = sa.acquisition_timeout_s()
        deadlines = list(sa.transport.timeouts_s)
    assert np.array_equal(trace.values, VALUES.astype(float))
    transfer = STEP.connection.timeout_s + VALUES.size * 4 / 1.0e6  # generic: 1 MB/s
    assert deadlines[-1] == pytest.approx(limit + transfer)
    assert limit >= STEP.connection.timeout_s


def test_a_profile_without_a_wait_command_starts_and_fetches_in_two_lines(tmp_path):
    text = GENERIC_TEXT.replace(READ_LINE, "\nread = false\n")
    assert '\nwait = "*WAI"\n' in text
    path = tmp_path / "no_wait.toml"
    path.write_text(text.replace('\nwait = "*WAI"\n', "\nwait = false\n"))
    profile = load_profile(path)
    assert profile.common.wait is None
    first = [item for item in first_acquisition() if item[0] != "*WAI"]
    dialogue = (
        configured()
        + first
        + retune_read_back()
        + [(compound_line(["INIT:IMM", "*OPC?"]), "1"), (TRACE_AND_ERRORS, block_then(OK))]
    )
    with replay_dialogue(dialogue, lambda t: ScpiAnalyzer(t, profile)) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        assert np.array_equal(sa.acquire_trace().values, VALUES.astype(float))
