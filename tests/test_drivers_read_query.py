"""The single query that starts, waits and fetches (``[analyzer.acquisition] read``, SCPI-1999
measurement instruction ``READ?`` = ABORt; INITiate; FETCh?), checked exchange by exchange
with the scripted transport, and a sweep against the SCPI simulator.

With it one acquisition is ``FREQ:CENT ...;:READ?`` (held settings and one query) instead of
``FREQ:CENT ...;:INIT:IMM;*WAI;:TRAC? TRACE1``, with the same verification: the error queue is
read in the line or by the step, a refused setting or a failed read is named, and the first
read after connecting goes alone. Without it (``read = false``, the default; the start, wait and
trace-query path is tested in ``test_drivers_compound.py``) nothing changes."""

from __future__ import annotations

import numpy as np
import pytest
from test_drivers_compound import (
    AT_2G,
    GENERIC,
    GENERIC_TEXT,
    OK,
    READ_LINE,
    REQUEST,
    STEP,
    VALUES,
    block_then,
    configured,
    first_read,
    read_acquisition,
    read_line,
    retune_read_back,
    warm_read,
)
from test_drivers_protocol import IDN, REQUEST_COMMANDS, readback, sets

from noisebench.drivers import ScpiAnalyzer, load_profile
from noisebench.drivers.profile import ProfileError, parse_profile
from noisebench.drivers.protocol import RECOVER, ieee_block, replay_dialogue
from noisebench.drivers.scpi_channel import split_reply_units
from noisebench.drivers.transport import InstrumentTimeout
from noisebench.errors import InstrumentError


def analyzer(transport):
    return ScpiAnalyzer(transport, GENERIC)


def warmed(sa: ScpiAnalyzer) -> None:
    """The calls that :func:`warm_read` scripts: both centres verified, READ? accepted."""
    sa.configure(REQUEST)
    sa.acquire_trace()
    sa.configure(AT_2G)
    sa.acquire_trace()


# ----------------------------------------------------------------------------- the profile


def test_generic_declares_the_read_query_and_it_is_not_available_by_default():
    assert READ_LINE in GENERIC_TEXT
    assert GENERIC.analyzer.acquisition.read == "READ?"
    assert STEP.analyzer.acquisition.read is None  # read = false
    assert load_profile("sim_compact").analyzer.acquisition.read is None  # key absent
    absent = parse_profile(GENERIC_TEXT.replace(READ_LINE, "\n"), "absent.toml")
    assert absent.analyzer.acquisition.read is None


@pytest.mark.parametrize("value", ['"READ"', '"READ?;:SYST:ERR?"', "true"])
def test_a_read_query_must_be_one_query(value):
    with pytest.raises(ProfileError, match="read"):
        parse_profile(GENERIC_TEXT.replace(READ_LINE, f"\nread = {value}\n"), "bad.toml")


# ----------------------------------------------------------------------------- the dialogue


def test_one_acquisition_is_the_held_settings_and_one_read_query():
    # SCPI-1999 Vol. 1 ch. 3 (measurement instructions, from memory): READ? = ABORt;
    # INITiate; FETCh?, so the units per acquisition drop from 4 (centre, INIT:IMM, *WAI,
    # TRAC?) to 2 (centre, READ?), the error query riding as before
    dialogue = warm_read() + read_acquisition("FREQ:CENT 1000000000")
    with replay_dialogue(dialogue, analyzer) as sa:
        warmed(sa)
        sa.configure(REQUEST)
        trace = sa.acquire_trace()
        limit = sa.acquisition_timeout_s()
        deadlines = list(sa.transport.timeouts_s)
        sent = [command for command, _ in sa.transport.log]
    assert np.array_equal(trace.values, VALUES.astype(float))
    assert trace.settings.center_hz == 1e9
    assert split_reply_units(sent[-1]) == ["FREQ:CENT 1000000000", ":READ?", ":SYST:ERR?"]
    # the block's deadline covers the acquisition and the transfer, as with *WAI
    transfer = GENERIC.connection.timeout_s + VALUES.size * 4 / 1.0e6
    assert deadlines[-1] == pytest.approx(limit + transfer)


def test_the_first_read_after_connecting_goes_alone_with_its_own_error_read():
    dialogue = configured() + first_read() + retune_read_back() + read_acquisition()
    with replay_dialogue(dialogue, analyzer) as sa:
        warmed(sa)


def refused_acquisition(dialogue):
    """Replay ``dialogue`` through a warmed, configured analyzer; the acquisition's error."""
    with replay_dialogue(dialogue, analyzer) as sa:
        warmed(sa)
        sa.configure(REQUEST)
        with pytest.raises(InstrumentError) as info:
            sa.acquire_trace()
    return info


def test_an_error_raised_by_the_read_query_is_named_and_not_retried():
    # a query that fails sends no reply unit (IEEE 488.2): the reply is the entry alone; an
    # instrument error is never retried (the script ends: a retry would fail the replay)
    dialogue = warm_read() + [
        (read_line("FREQ:CENT 1000000000"), '-230,"Data corrupt or stale"'),
        ("SYST:ERR?", OK),
        ("FREQ:CENT 1000000000", None),  # the held centre alone: not the culprit
        ("SYST:ERR?", OK),
    ]
    info = refused_acquisition(dialogue)
    assert info.value.code == -230 and info.value.command == "READ?"
    assert read_line("FREQ:CENT 1000000000") in info.value.context["commands_since_last_check"]


def test_a_setting_refused_in_a_read_line_is_named():
    refused = '-222,"Data out of range"'
    dialogue = warm_read() + [
        (read_line("FREQ:CENT 1000000000"), block_then(refused)),
        ("SYST:ERR?", OK),
        ("FREQ:CENT 1000000000", None),
        ("SYST:ERR?", refused),
        ("SYST:ERR?", OK),
    ]
    info = refused_acquisition(dialogue)
    assert info.value.code == -222 and info.value.command == "FREQ:CENT 1000000000"
    assert info.value.context["in_compound"] == "READ?"


def test_a_read_query_refused_the_first_time_is_named_after_its_timeout():
    # an instrument without READ? (a profile that declares it wrongly): no reply, so the
    # block read times out; the recovery's error read names the query
    dialogue = configured() + [
        ("FORM REAL,32", None),
        ("FORM:BORD NORM", None),
        ("READ?", InstrumentTimeout("no reply", command="READ?")),
        ("ABOR", None),  # a timed-out acquisition is aborted
        (RECOVER, "clear"),
        ("*IDN?", IDN),
        ("SYST:ERR?", '-113,"Undefined header"'),
        ("SYST:ERR?", OK),
    ]
    with replay_dialogue(dialogue, analyzer) as sa:
        sa.configure(REQUEST)
        with pytest.raises(InstrumentError) as info:
            sa.acquire_trace()
    assert info.value.code == -113 and info.value.command == "READ?"


def test_in_a_step_a_failed_read_costs_one_timeout_and_is_named():
    dialogue = warm_read() + [
        (read_line("FREQ:CENT 1000000000", errors=False), ieee_block(VALUES)),
        (
            read_line("FREQ:CENT 2000000000", errors=False),
            InstrumentTimeout("no reply", command="READ?"),
        ),
        ("ABOR", None),
        (RECOVER, "clear"),
        ("*IDN?", IDN),
        ("SYST:ERR?", '-230,"Data corrupt or stale"'),
        ("SYST:ERR?", OK),
    ]
    with replay_dialogue(dialogue, analyzer) as sa:
        warmed(sa)
        sa.begin_step()
        sa.configure(REQUEST)
        sa.acquire_trace()
        sa.configure(AT_2G)
        with pytest.raises(InstrumentError) as info:
            sa.acquire_trace()
        sa.end_step(check=False)  # the sequencer abandons the step
    assert info.value.code == -230 and info.value.command == "READ?"


def test_after_an_instrument_error_the_read_goes_alone_again():
    dialogue = (
        warm_read()
        + [(read_line(), '-230,"Data corrupt or stale"'), ("SYST:ERR?", OK)]
        # the state is unknown: everything sent and read back, READ? alone again
        + configured()[2:]  # (no connect: the same connection)
        + [("READ?", ieee_block(VALUES)), ("SYST:ERR?", OK)]
    )
    with replay_dialogue(dialogue, analyzer) as sa:
        warmed(sa)
        with pytest.raises(InstrumentError):
            sa.acquire_trace()
        sa.configure(REQUEST)
        assert np.array_equal(sa.acquire_trace().values, VALUES.astype(float))


def test_with_an_error_read_after_every_command_each_read_goes_alone():
    # error_check = "each" (bringing up an instrument): no compound lines, so every READ?
    # goes alone with its own error read: 2 units per acquisition instead of INIT:IMM, its
    # error read, *OPC?, the trace query and its error read
    each = parse_profile(GENERIC_TEXT.replace('error_check = "step"', 'error_check = "each"'))
    assert each.analyzer.acquisition.read == "READ?"
    dialogue = (
        [("*IDN?", IDN), ("*CLS", None)]
        + sets(*REQUEST_COMMANDS)
        + readback()
        + [("SYST:ERR?", OK)]
        + sets("FORM REAL,32", "FORM:BORD NORM")
        + [("READ?", ieee_block(VALUES)), ("SYST:ERR?", OK)] * 2
    )
    with replay_dialogue(dialogue, lambda t: ScpiAnalyzer(t, each)) as sa:
        sa.configure(REQUEST)
        sa.acquire_trace()
        assert np.array_equal(sa.acquire_trace().values, VALUES.astype(float))


# a sweep against the simulator with READ? and without it (identical results, two units per
# acquisition): tests/test_error_batch.py::test_a_clean_sweep_gives_identical_results_...
