"""Generic SCPI-1999 / IEEE 488.2 program-message parsing, independent of any instrument.

What it does:

- splits a program message (one received line) into program message units at ``;`` outside
  quoted strings, and each unit into a header and its parameters (``,`` outside quotes);
- resolves headers against a :class:`CommandTree` of patterns such as
  ``"[SENSe:]FREQuency:CENTer"`` or ``"CALCulate:MARKer<n>:X"``: case-insensitive, short form
  (the upper-case letters of the pattern) or long form, optional ``[nodes]``, numeric suffixes,
  a leading ``:`` for the root and, after a ``;``, headers relative to the previous one
  (SCPI-1999 Vol. 1, from memory: the path is the previous header minus its leaf);
- converts parameters: decimal numbers with suffix units and multipliers (``1 MHZ``, ``10 ms``,
  ``250 MA`` = 250 mA for a current), ``MINimum``/``MAXimum``/``DEFault``, booleans
  ``ON``/``OFF``/``1``/``0``, character data matched in short or long form, quoted strings.

Every failure raises :class:`ScpiError` carrying the standard SCPI error number and text, so a
server can queue it unchanged (``-113,"Undefined header;..."``).
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from decimal import Decimal
from enum import Enum
from typing import Any, Generic, TypeVar

__all__ = [
    "ERROR_TEXT",
    "CommandTree",
    "Mnemonic",
    "NodeSpec",
    "NumericSpecial",
    "ProgramUnit",
    "ScpiError",
    "compile_pattern",
    "format_bool",
    "format_number",
    "match_choice",
    "parse_boolean",
    "parse_integer",
    "parse_message",
    "parse_numeric",
    "parse_string",
    "split_units",
]

#: Standard SCPI-1999 error numbers used by the simulator and their standard texts.
ERROR_TEXT: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -101: "Invalid character",
    -102: "Syntax error",
    -103: "Invalid separator",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -112: "Program mnemonic too long",
    -113: "Undefined header",
    -114: "Header suffix out of range",
    -131: "Invalid suffix",
    -138: "Suffix not allowed",
    -141: "Invalid character data",
    -151: "Invalid string data",
    -200: "Execution error",
    -213: "Init ignored",
    -221: "Settings conflict",
    -222: "Data out of range",
    -223: "Too much data",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -350: "Queue overflow",
}

_MAX_MNEMONIC = 12  # IEEE 488.2 (from memory): program mnemonics are at most 12 characters


class ScpiError(Exception):
    """A SCPI error-queue entry: standard ``code``, standard ``text`` and optional ``detail``."""

    def __init__(self, code: int, detail: str | None = None) -> None:
        self.code = int(code)
        self.text = ERROR_TEXT.get(self.code, "Device-specific error")
        self.detail = detail
        super().__init__(self.entry())

    def entry(self) -> str:
        """The error-queue string: ``<code>,"<text>[;<detail>]"`` (double quotes doubled)."""
        body = self.text if not self.detail else f"{self.text};{self.detail}"
        return f'{self.code},"{body.replace(chr(34), chr(39))}"'

    @property
    def is_command_error(self) -> bool:
        """True for -100..-199: the parser discards the rest of the program message."""
        return -199 <= self.code <= -100


# ----------------------------------------------------------------------------- splitting


def _split_outside_quotes(text: str, sep: str) -> list[str]:
    """Split ``text`` at ``sep`` characters that are not inside '...' or "..." strings."""
    parts: list[str] = []
    current: list[str] = []
    quote: str | None = None
    i = 0
    while i < len(text):
        ch = text[i]
        if quote is not None:
            current.append(ch)
            if ch == quote:
                if i + 1 < len(text) and text[i + 1] == quote:  # doubled quote = literal quote
                    current.append(quote)
                    i += 1
                else:
                    quote = None
        elif ch in "'\"":
            quote = ch
            current.append(ch)
        elif ch == sep:
            parts.append("".join(current))
            current = []
        else:
            current.append(ch)
        i += 1
    if quote is not None:
        raise ScpiError(-151, "unterminated quoted string")
    parts.append("".join(current))
    return parts


def split_units(line: str) -> list[str]:
    """Split one program message into its units (at ``;`` outside quotes); empty units dropped."""
    if any(ord(ch) > 126 or (ord(ch) < 32 and ch not in "\t") for ch in line):
        raise ScpiError(-101, "only printable ASCII is accepted")
    return [unit.strip() for unit in _split_outside_quotes(line, ";") if unit.strip()]


# ----------------------------------------------------------------------------- headers


@dataclass(frozen=True)
class Mnemonic:
    """One header node as received: upper-cased name without its numeric suffix."""

    name: str
    suffix: int | None = None

    def __str__(self) -> str:
        return self.name if self.suffix is None else f"{self.name}{self.suffix}"


@dataclass(frozen=True)
class ProgramUnit:
    """One program message unit: header nodes, query flag and raw parameter tokens."""

    text: str
    mnemonics: tuple[Mnemonic, ...]
    query: bool
    common: bool  # IEEE 488.2 common command (``*XXX``)
    absolute: bool  # header started with ':' (from the root)
    params: tuple[str, ...]


_MNEMONIC_RE = re.compile(r"^([A-Za-z][A-Za-z0-9_]*?)(\d*)$")


def _parse_mnemonic(token: str, unit: str) -> Mnemonic:
    match = _MNEMONIC_RE.match(token)
    if not match:
        raise ScpiError(-102 if token else -103, f"bad header {unit!r}")
    name, digits = match.group(1), match.group(2)
    if len(token) > _MAX_MNEMONIC:
        raise ScpiError(-112, f"{token!r} is longer than {_MAX_MNEMONIC} characters")
    return Mnemonic(name.upper(), int(digits) if digits else None)


def parse_unit(text: str) -> ProgramUnit:
    """Parse one program message unit (``HEADer[?] [param[,param...]]``)."""
    text = text.strip()
    if not text:
        raise ScpiError(-102, "empty command")
    match = re.match(r"^(\S+)\s*(.*)$", text, re.S)
    head, rest = (match.group(1), match.group(2)) if match else (text, "")
    query = head.endswith("?")
    if query:
        head = head[:-1]
    if "?" in head:
        raise ScpiError(-102, f"misplaced '?' in {text!r}")
    params = _parse_params(rest.strip())
    if head.startswith("*"):
        name = head[1:]
        if not name.isalpha() or len(name) > _MAX_MNEMONIC:
            raise ScpiError(-102, f"bad common command {text!r}")
        return ProgramUnit(text, (Mnemonic("*" + name.upper()),), query, True, True, params)
    absolute = head.startswith(":")
    body = head[1:] if absolute else head
    if not body:
        raise ScpiError(-102, f"missing header in {text!r}")
    nodes = tuple(_parse_mnemonic(tok, text) for tok in body.split(":"))
    return ProgramUnit(text, nodes, query, False, absolute, params)


def _parse_params(rest: str) -> tuple[str, ...]:
    if not rest:
        return ()
    tokens = [tok.strip() for tok in _split_outside_quotes(rest, ",")]
    if any(tok == "" for tok in tokens):
        raise ScpiError(-103 if len(tokens) > 1 else -102, "empty parameter")
    return tuple(tokens)


def parse_message(line: str) -> Iterator[ProgramUnit]:
    """Parse a whole program message lazily, one unit at a time (so errors stop the line there)."""
    for unit in split_units(line):
        yield parse_unit(unit)


# ----------------------------------------------------------------------------- patterns


@dataclass(frozen=True)
class NodeSpec:
    """One node of a command pattern: short and long form, optional, numeric-suffix range."""

    short: str
    long: str
    optional: bool = False
    suffix_range: tuple[int, int] | None = None  # None: no numeric suffix accepted

    def matches(self, mnemonic: Mnemonic) -> bool:
        """True when ``mnemonic`` names this node (short or long form; suffix checked later)."""
        return mnemonic.name in (self.short, self.long)

    def suffix_ok(self, mnemonic: Mnemonic) -> bool:
        if mnemonic.suffix is None:
            return True
        if self.suffix_range is None:
            return False
        low, high = self.suffix_range
        return low <= mnemonic.suffix <= high


def _node(word: str, optional: bool, suffix_range: tuple[int, int] | None) -> NodeSpec:
    short = "".join(ch for ch in word if ch.isupper() or ch.isdigit() or ch == "*")
    if not short:
        raise ValueError(f"pattern node {word!r} has no upper-case short form")
    return NodeSpec(short, word.upper(), optional, suffix_range)


_NODE_RE = re.compile(r"^(\*?[A-Za-z]+)(<n>)?$")


def compile_pattern(pattern: str, suffix_max: int = 1) -> tuple[NodeSpec, ...]:
    """Compile ``"[SENSe:]BANDwidth[:RESolution]"`` into node specs.

    ``<n>`` after a node name allows a numeric suffix 1..``suffix_max`` (default suffix 1).
    """
    nodes: list[NodeSpec] = []
    for raw in re.findall(r"\[:?[^\]]+?:?\]|[^:\[\]]+", pattern):
        optional = raw.startswith("[")
        word = raw.strip("[]:")
        match = _NODE_RE.match(word)
        if not match:
            raise ValueError(f"bad pattern node {raw!r} in {pattern!r}")
        suffix = (1, suffix_max) if match.group(2) else None
        nodes.append(_node(match.group(1), optional, suffix))
    return tuple(nodes)


H = TypeVar("H")


@dataclass
class _Entry(Generic[H]):
    pattern: str
    nodes: tuple[NodeSpec, ...]
    handler: H


@dataclass
class Resolved(Generic[H]):
    """A header resolved to its tree entry.

    ``suffixes`` holds one numeric suffix per ``<n>`` node (default 1). ``paths`` are the
    header paths a following relative header may continue from: the received nodes minus the
    leaf, then the full header (omitted optional nodes filled in) minus its last node, so that
    after ``FORM REAL`` (= ``FORM:DATA REAL``) ``BORD SWAP`` means ``FORM:BORD SWAP``.
    """

    handler: H
    pattern: str
    suffixes: tuple[int, ...]
    paths: tuple[tuple[Mnemonic, ...], ...]

    @property
    def path(self) -> tuple[Mnemonic, ...]:
        return self.paths[0]


@dataclass
class CommandTree(Generic[H]):
    """Header patterns of one instrument, each mapped to a handler (set and query share it)."""

    entries: list[_Entry[H]] = field(default_factory=list)

    def add(self, pattern: str, handler: H, *, suffix_max: int = 1) -> None:
        self.entries.append(_Entry(pattern, compile_pattern(pattern, suffix_max), handler))

    def resolve(self, unit: ProgramUnit, previous: Resolved[H] | None = None) -> Resolved[H]:
        """Resolve ``unit``'s header; a relative header continues from ``previous``'s paths.

        Raises ``ScpiError(-113)`` for an unknown header and ``-114`` for a suffix out of range.
        """
        if unit.absolute or unit.common or previous is None:
            candidates = [unit.mnemonics]
        else:
            candidates = [tuple(p) + unit.mnemonics for p in dict.fromkeys(previous.paths)]
        for received in candidates:
            found = self._match(received)
            if found is not None:
                entry, expanded = found
                suffixes = tuple(
                    m.suffix or 1
                    for m, node in zip(expanded, entry.nodes, strict=True)
                    if node.suffix_range is not None
                )
                return Resolved(
                    entry.handler, entry.pattern, suffixes, (received[:-1], expanded[:-1])
                )
        if any(self._suffix_problem(received) for received in candidates):
            raise ScpiError(-114, _show(candidates[0]))
        raise ScpiError(-113, _show(candidates[0]))

    def _match(
        self, received: tuple[Mnemonic, ...]
    ) -> tuple[_Entry[H], tuple[Mnemonic, ...]] | None:
        for entry in self.entries:
            expanded = _match_nodes(entry.nodes, received, check_suffix=True)
            if expanded is not None:
                return entry, expanded
        return None

    def _suffix_problem(self, received: tuple[Mnemonic, ...]) -> bool:
        return any(
            _match_nodes(e.nodes, received, check_suffix=False) is not None for e in self.entries
        )


def _show(received: Sequence[Mnemonic]) -> str:
    return ":".join(str(m) for m in received)


def _match_nodes(
    nodes: tuple[NodeSpec, ...], received: tuple[Mnemonic, ...], *, check_suffix: bool
) -> tuple[Mnemonic, ...] | None:
    """Match received mnemonics against pattern nodes (optional nodes may be skipped).

    Returns the full header, one mnemonic per pattern node (short form; skipped optional nodes
    filled in), or None when the header does not match.
    """

    def walk(i: int, j: int) -> tuple[Mnemonic, ...] | None:
        if i == len(nodes):
            return () if j == len(received) else None
        node = nodes[i]
        if (
            j < len(received)
            and node.matches(received[j])
            and (not check_suffix or node.suffix_ok(received[j]))
        ):
            rest = walk(i + 1, j + 1)
            if rest is not None:
                return (Mnemonic(node.short, received[j].suffix),) + rest
        if node.optional:
            rest = walk(i + 1, j)
            if rest is not None:
                return (Mnemonic(node.short),) + rest
        return None

    return walk(0, 0)


# ----------------------------------------------------------------------------- parameters


class NumericSpecial(str, Enum):
    """Character data accepted in place of a number (SCPI-1999 Vol. 1, from memory)."""

    MINIMUM = "MIN"
    MAXIMUM = "MAX"
    DEFAULT = "DEF"


_SPECIAL = {
    "MIN": NumericSpecial.MINIMUM,
    "MINIMUM": NumericSpecial.MINIMUM,
    "MAX": NumericSpecial.MAXIMUM,
    "MAXIMUM": NumericSpecial.MAXIMUM,
    "DEF": NumericSpecial.DEFAULT,
    "DEFAULT": NumericSpecial.DEFAULT,
}

# IEEE 488.2 decimal numeric program data, then an optional suffix (from memory).
_NUMBER_RE = re.compile(r"^([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE]\s*[+-]?\d+)?)\s*([A-Za-z/]*)$")

# SCPI-1999 suffix multipliers (from memory). ``M`` is milli, except in MHZ and MOHM (mega).
_MULTIPLIERS = {
    "EX": 18,
    "PE": 15,
    "T": 12,
    "G": 9,
    "MA": 6,
    "K": 3,  # powers of ten
    "M": -3,
    "U": -6,
    "N": -9,
    "P": -12,
    "F": -15,
    "A": -18,
}
_MEGA_UNITS = {"HZ", "OHM"}
_LOG_UNITS = {"DB", "DBM"}  # logarithmic units take no multiplier


def _suffix_exponent(suffix: str, unit: str | None) -> int:
    """Power of ten of a unit suffix such as ``MHZ`` for base ``unit`` (``HZ``, ``S``, ``V``)."""
    s = suffix.upper()
    if not s:
        return 0
    if unit is None:
        raise ScpiError(-138, f"{suffix!r} given for a unitless parameter")
    u = unit.upper()
    if s == u:
        return 0
    if u in _LOG_UNITS or not s.endswith(u):
        raise ScpiError(-131, f"{suffix!r} is not a {unit} unit")
    prefix = s[: -len(u)]
    if prefix == "M" and u in _MEGA_UNITS:
        return 6
    if prefix not in _MULTIPLIERS:
        raise ScpiError(-131, f"unknown multiplier in {suffix!r}")
    return _MULTIPLIERS[prefix]


def parse_numeric(
    token: str, unit: str | None = None, *, allow_special: bool = True
) -> float | NumericSpecial:
    """Decimal numeric data (optionally with a ``unit`` suffix) or MIN/MAX/DEF.

    Returns the value in the base unit (``1 MHZ`` -> 1e6 for ``unit="HZ"``).
    """
    special = _SPECIAL.get(token.strip().upper())
    if special is not None:
        if not allow_special:
            raise ScpiError(-224, f"{token!r} not accepted here")
        return special
    match = _NUMBER_RE.match(token.strip())
    if not match:
        raise ScpiError(-104, f"{token!r} is not a number")
    exponent = _suffix_exponent(match.group(2), unit)
    # exact decimal scaling, one rounding: "1.001 GHZ" is the double nearest 1.001e9
    value = float(Decimal(match.group(1).replace(" ", "")).scaleb(exponent))
    if not math.isfinite(value):
        raise ScpiError(-222, f"{token!r} overflows")
    return value


def parse_integer(token: str) -> int | NumericSpecial:
    """Numeric data rounded to an integer (IEEE 488.2: non-integers are rounded) or MIN/MAX/DEF."""
    value = parse_numeric(token, None)
    if isinstance(value, NumericSpecial):
        return value
    return int(math.floor(value + 0.5))


_BOOL = {"ON": True, "OFF": False}


def parse_boolean(token: str) -> bool:
    """``ON``/``OFF`` or a number (rounded; non-zero is ON), SCPI-1999, from memory."""
    word = token.strip().upper()
    if word in _BOOL:
        return _BOOL[word]
    try:
        value = parse_numeric(token, None, allow_special=False)
    except ScpiError as exc:
        raise ScpiError(-104, f"{token!r} is not ON, OFF, 1 or 0") from exc
    return round(float(value)) != 0


def format_bool(value: bool) -> str:
    """Boolean response data: ``1`` or ``0``."""
    return "1" if value else "0"


def format_number(value: float) -> str:
    """NR3-style numeric response with the shortest text that reads back as the same double."""
    if float(value).is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(float(value))


T = TypeVar("T")


def match_choice(token: str, choices: dict[str, T]) -> T:
    """Character data: ``choices`` maps patterns like ``"GAUSsian"`` to values.

    Accepts the short form (upper-case letters) or the long form, case-insensitive.
    """
    word = token.strip().upper()
    for pattern, value in choices.items():
        short = "".join(ch for ch in pattern if not ch.islower())
        if word in (short.upper(), pattern.upper()):
            return value
    if token.strip()[:1] in "'\"":
        raise ScpiError(-104, f"{token} is a string; expected one of {_choice_list(choices)}")
    raise ScpiError(-224, f"{token!r}; expected one of {_choice_list(choices)}")


def _choice_list(choices: dict[str, Any]) -> str:
    return "|".join(choices)


def parse_string(token: str) -> str:
    """String program data: '...' or "..." with doubled quotes as literal quotes."""
    t = token.strip()
    if len(t) < 2 or t[0] not in "'\"" or t[-1] != t[0]:
        raise ScpiError(-104, f"{token!r} is not a quoted string")
    quote = t[0]
    return t[1:-1].replace(quote * 2, quote)


ParamParser = Callable[[str], Any]
