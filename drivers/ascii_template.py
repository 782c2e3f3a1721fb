"""Command templates and reply patterns for ASCII serial controllers, as a pure (sans-I/O) codec.

What it is for: a bench file spells out each operation of a plain-text controller as a template to send
(a Python format string with named fields, ``"GO {position_mm:.4f}"``) and a regular expression the reply
line must match in full (``"AT (?P<position_mm>[-+0-9.]+)"``). :func:`compile_commands` checks all of it
once, when the bench file is read, and turns it into a :class:`CommandSet` that builds command bytes and
turns reply lines into values. The tables :data:`OPERATIONS` say which operations each instrument kind
has, which fields a template may use and which groups a pattern must name.

What it must not do: open, read or write anything, wait, look at a clock, or know any particular
controller. Line splitting is the transport's job; deciding what a value means (limits, units) is the
device's (template_devices.py).

Who is at fault: a template or pattern that cannot work raises
:class:`~shotpair.drivers.errors.ConfigError` naming its key path
(``bench.<name>.options.commands.<op>.send`` / ``.reply``). A reply line that does not match, or a value
that is not a number, raises :class:`~shotpair.drivers.errors.InstrumentReplyError`; a reply that matches
the ``error`` pattern raises :class:`ControllerReplyError` (a subclass) carrying the controller's code and
message. Wrong values from the calling code (NaN, infinity, a value the operation does not have) are
programmer errors: ValueError or TypeError.
"""

from __future__ import annotations

import codecs
import math
import numbers
import re
import string
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

from .errors import ConfigError, InstrumentReplyError

__all__ = [
    "OperationSpec",
    "OPERATIONS",
    "ONE_OF",
    "IDENTITY",
    "Template",
    "ReplyPattern",
    "ErrorPattern",
    "Command",
    "CommandSet",
    "ControllerReplyError",
    "ReplyValues",
    "compile_commands",
    "parse_number",
]

ValueKind = Literal["none", "number", "bool", "text"]

#: What a parsed reply gives: group name -> float (numbers), bool (flags) or str (identity).
ReplyValues = dict[str, float | bool | str]


@dataclass(frozen=True)
class OperationSpec:
    """What one operation of an instrument kind may send and must read back.

    Attributes
    ----------
    doc : str
        One line for messages and documentation.
    fields : frozenset of str
        Names a send template may use (``position_mm``...). Empty: the command takes no value.
    groups : tuple of frozenset of str
        Alternatives for the named groups the reply pattern must hold: exactly one set must be present
        (``{"position_mm"}`` or ``{"position_units"}``). Empty tuple: an acknowledgement (or no reply),
        no named group allowed.
    value : {"none", "number", "bool", "text"}
        How group text is turned into a value.
    required : bool
        Whether every bench file must give this operation.
    """

    doc: str
    fields: frozenset[str] = frozenset()
    groups: tuple[frozenset[str], ...] = ()
    value: ValueKind = "none"
    required: bool = True

    @property
    def group_names(self) -> frozenset[str]:
        """Every group name any alternative allows."""
        return frozenset().union(*self.groups) if self.groups else frozenset()


def _alt(*names: str) -> frozenset[str]:
    return frozenset(names)


_POSITION = (_alt("position_mm"), _alt("position_units"))

#: Operations per instrument kind. ``*_units`` fields and groups are in the controller's own units
#: (``position_mm * position_scale``), for controllers that count steps or micrometres.
OPERATIONS: dict[str, dict[str, OperationSpec]] = {
    "delay_axis": {
        "move_absolute": OperationSpec("start a move to an absolute position",
                                       fields=_alt("position_mm", "position_units")),
        "query_position": OperationSpec("read back the position", groups=_POSITION, value="number"),
        "query_moving": OperationSpec("ask whether the axis moves or settles", groups=(_alt("moving"),),
                                      value="bool", required=False),
        "query_done": OperationSpec("ask whether the last move has finished", groups=(_alt("done"),),
                                    value="bool", required=False),
        "home": OperationSpec("start a homing run"),
        "query_homed": OperationSpec("ask whether the axis is homed", groups=(_alt("homed"),), value="bool"),
        "stop": OperationSpec("stop any motion now"),
        "query_limits": OperationSpec("read the controller's travel limits",
                                      groups=(_alt("low_mm", "high_mm"), _alt("low_units", "high_units")),
                                      value="number", required=False),
    },
    "chopper": {
        "set_frequency": OperationSpec("set the blade frequency", fields=_alt("frequency_hz")),
        "query_frequency": OperationSpec("read the blade frequency", groups=(_alt("frequency_hz"),), value="number"),
        "set_phase": OperationSpec("set the phase to the laser trigger", fields=_alt("phase_deg")),
        "query_phase": OperationSpec("read the phase", groups=(_alt("phase_deg"),), value="number"),
        "query_locked": OperationSpec("ask whether the blade is locked to the laser", groups=(_alt("locked"),),
                                      value="bool"),
    },
    "shutter": {
        "open": OperationSpec("open the shutter"),
        "close": OperationSpec("close the shutter"),
        "query_open": OperationSpec("ask whether the shutter is open", groups=(_alt("open"),), value="bool"),
    },
}

#: Operations of which a kind needs exactly one.
ONE_OF: dict[str, tuple[tuple[str, ...], ...]] = {"delay_axis": (("query_moving", "query_done"),)}

#: The optional identity query: its pattern may name ``identity``, else the whole reply line is the identity.
IDENTITY = OperationSpec("ask the controller who it is", groups=(_alt("identity"), _alt()), value="text",
                         required=False)

_COMMAND_KEYS = ("send", "reply", "true_values", "false_values")
# The last character of a format spec is its presentation type when it is a letter or '%'.
_INTEGER_TYPES = frozenset("bdoxX")
_REFUSED_TYPES = frozenset("cs")
_NUMBER_RE = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")


def _show(text: str | bytes, limit: int = 60) -> str:
    return repr(text[:limit]) + ("..." if len(text) > limit else "")


def parse_number(text: str, *, instrument: str = "?", what: str = "value") -> float:
    """Turn a decimal number written by a controller into a float.

    Accepts ``12``, ``-0.5``, ``+1.25e-3``, ``.5``; refuses words (``nan``, ``inf``), underscores, spaces and
    anything that overflows to infinity.

    Raises
    ------
    InstrumentReplyError
        Naming ``what`` and the text.
    """
    if not _NUMBER_RE.fullmatch(text):
        raise InstrumentReplyError(f"{what}: {_show(text)} is not a decimal number", instrument=instrument)
    value = float(text)
    if not math.isfinite(value):
        raise InstrumentReplyError(f"{what}: {_show(text)} is out of the range of a float", instrument=instrument)
    return value


# ---------------------------------------------------------------------------------------------- templates


@dataclass(frozen=True)
class Template:
    """A send template: literal text and named, formatted number fields.

    Attributes
    ----------
    text : str
        The template as written.
    pieces : tuple
        ``(literal, field or None, format spec)`` in order.
    """

    text: str
    pieces: tuple[tuple[str, str | None, str], ...]

    @property
    def fields(self) -> frozenset[str]:
        """Names of the fields the template uses."""
        return frozenset(f for _, f, _ in self.pieces if f is not None)

    @classmethod
    def parse(cls, text: object, *, allowed: Collection[str], key_path: str) -> Template:
        """Check a template against the fields its operation offers.

        Parameters
        ----------
        text : str
            The template (``"GO {position_mm:.4f}"``; ``{{`` and ``}}`` are literal braces).
        allowed : collection of str
            Field names the operation offers.
        key_path : str
            Where the template is written, for the error.

        Raises
        ------
        ConfigError
            For a non-string or blank template, a syntax error, a positional, indexed, attribute or
            converted field (``{}``, ``{0}``, ``{x.y}``, ``{x!r}``), a nested spec, a field the operation
            does not offer, or a format spec a number cannot take.
        """
        fields_text = ", ".join(f"{{{f}}}" for f in sorted(allowed)) or "none (this command takes no value)"
        if not isinstance(text, str) or not text.strip():
            raise ConfigError("a command template must be non-empty text", key_path=key_path, value=text,
                              allowed=f"text with fields {fields_text}")
        try:
            parsed = list(string.Formatter().parse(text))
        except ValueError as exc:
            raise ConfigError(f"template syntax error ({exc}; write {{{{ and }}}} for literal braces)",
                              key_path=key_path, value=text) from None
        pieces: list[tuple[str, str | None, str]] = []
        for literal, name, spec, conversion in parsed:
            if name is None:
                pieces.append((literal, None, ""))
                continue
            if not name or not name.isidentifier():
                raise ConfigError(f"template field {{{name}}} must be a plain name", key_path=key_path, value=text,
                                  allowed=fields_text)
            if name not in allowed:
                raise ConfigError(f"unknown template field {{{name}}}", key_path=key_path, value=text,
                                  allowed=fields_text)
            if conversion is not None:
                raise ConfigError(f"template field {{{name}!{conversion}}}: conversions are not allowed, use a "
                                  "format spec such as :.4f", key_path=key_path, value=text)
            spec = spec or ""
            if "{" in spec or "}" in spec:
                raise ConfigError(f"template field {{{name}}}: nested fields in a format spec are not allowed",
                                  key_path=key_path, value=text)
            if spec and spec[-1] in _REFUSED_TYPES:
                raise ConfigError(f"template field {{{name}:{spec}}}: format type {spec[-1]!r} is not for numbers",
                                  key_path=key_path, value=text, allowed="f, e, g, d, x, %... (e.g. :.4f)")
            try:
                _format_value(1.5, spec)
            except (ValueError, TypeError) as exc:
                raise ConfigError(f"template field {{{name}:{spec}}}: bad format spec ({exc})", key_path=key_path,
                                  value=text) from None
            pieces.append((literal, name, spec))
        return cls(text=text, pieces=tuple(pieces))

    def render(self, values: Mapping[str, float]) -> str:
        """The command text (without terminator) for ``values``.

        Integer format types (``d``, ``x``, ``o``, ``b``) take the value rounded to the nearest integer
        (halves to even, as Python's ``round``).

        Raises
        ------
        ValueError
            If a value the template uses is missing, not finite (NaN, infinity).
        TypeError
            If such a value is not a real number (bools are refused too).
        """
        out: list[str] = []
        for literal, name, spec in self.pieces:
            out.append(literal)
            if name is None:
                continue
            if name not in values:
                raise ValueError(f"template {self.text!r} needs a value for {name!r}")
            value = values[name]
            if isinstance(value, bool) or not isinstance(value, numbers.Real):
                raise TypeError(f"template field {name!r} takes a real number, got {value!r}")
            if not math.isfinite(value):
                raise ValueError(f"template field {name!r} must be finite, got {value!r}")
            out.append(_format_value(float(value), spec))
        return "".join(out)


def _format_value(value: float, spec: str) -> str:
    if spec and spec[-1] in _INTEGER_TYPES:
        return format(round(value), spec)
    return format(value, spec)


# ------------------------------------------------------------------------------------------------ replies


def _compile_regex(text: object, key_path: str) -> re.Pattern[str]:
    if not isinstance(text, str):
        raise ConfigError("a reply pattern must be text (a Python regular expression)", key_path=key_path, value=text)
    try:
        return re.compile(text)
    except re.error as exc:
        raise ConfigError(f"reply pattern is not a valid regular expression ({exc})", key_path=key_path,
                          value=text) from None


def _text_list(values: object, key_path: str) -> frozenset[str]:
    if not isinstance(values, (list, tuple)) or not values or not all(isinstance(v, str) for v in values):
        raise ConfigError("must be a non-empty list of texts", key_path=key_path, value=values,
                          allowed='e.g. ["1", "YES"]')
    return frozenset(values)


@dataclass(frozen=True)
class ReplyPattern:
    """A compiled reply pattern: ``fullmatch`` on the reply line, values from named groups.

    ``regex`` is None for ``reply = ""`` (the controller sends nothing back). Booleans are true when the
    group's text is one of ``true_values`` (exact, case-sensitive); with ``false_values`` given, a text in
    neither list is a reply error.
    """

    text: str
    regex: re.Pattern[str] | None
    value: ValueKind
    true_values: frozenset[str] = frozenset()
    false_values: frozenset[str] = frozenset()

    @classmethod
    def parse(cls, text: object, spec: OperationSpec, *, key_path: str, true_values: object = None,
              false_values: object = None) -> ReplyPattern:
        """Compile and check a reply pattern for an operation.

        ``key_path`` is that of the pattern (``...commands.<op>.reply``); the true/false lists sit beside it.

        Raises
        ------
        ConfigError
            For a bad regular expression, a value operation with an empty pattern, a missing or unknown
            named group, two alternatives at once, a boolean without ``true_values`` or overlapping lists,
            or true/false lists on an operation that has no flag.
        """
        base = key_path.rpartition(".")[0]
        if spec.value != "bool" and (true_values is not None or false_values is not None):
            raise ConfigError("true_values / false_values belong to yes/no queries only",
                              key_path=f"{base}.true_values" if true_values is not None else f"{base}.false_values",
                              value=true_values if true_values is not None else false_values)
        if text == "" and spec.value == "none":
            return cls(text="", regex=None, value="none")
        if text == "":
            raise ConfigError("this query reads a value, so its reply pattern cannot be empty", key_path=key_path,
                              value=text)
        regex = _compile_regex(text, key_path)
        assert isinstance(text, str)
        names = set(regex.groupindex)
        wanted = " or ".join("(" + ", ".join(f"(?P<{g}>...)" for g in sorted(alt)) + ")" if alt else "no group"
                             for alt in spec.groups) or "no named group (an acknowledgement such as OK)"
        unknown = names - spec.group_names
        if unknown:
            raise ConfigError(f"reply pattern names group(s) {', '.join(sorted(unknown))} that this operation "
                              "does not read", key_path=key_path, value=text, allowed=wanted)
        if spec.groups:
            present = [alt for alt in spec.groups if alt and alt <= names]
            if len(present) > 1:
                raise ConfigError("reply pattern names two alternatives at once; keep one", key_path=key_path,
                                  value=text, allowed=wanted)
            if any(alt & names and not alt <= names for alt in spec.groups):
                raise ConfigError("reply pattern names only part of a group set", key_path=key_path, value=text,
                                  allowed=wanted)
            if not present and frozenset() not in spec.groups:
                raise ConfigError("reply pattern lacks the group this operation reads", key_path=key_path,
                                  value=text, allowed=wanted)
        trues: frozenset[str] = frozenset()
        falses: frozenset[str] = frozenset()
        if spec.value == "bool":
            if true_values is None:
                raise ConfigError("a yes/no query needs true_values: the texts of its group that mean yes",
                                  key_path=f"{base}.true_values", allowed='e.g. ["1"] or ["YES"]')
            trues = _text_list(true_values, f"{base}.true_values")
            if false_values is not None:
                falses = _text_list(false_values, f"{base}.false_values")
                if trues & falses:
                    raise ConfigError("a text cannot be in both true_values and false_values",
                                      key_path=f"{base}.false_values", value=sorted(trues & falses))
        return cls(text=text, regex=regex, value=spec.value, true_values=trues, false_values=falses)

    def match(self, line: str, *, instrument: str, what: str) -> ReplyValues | None:
        """Values from a reply line (terminator removed), or None when it does not match.

        ``what`` names the operation for messages. Raises InstrumentReplyError when a matched group holds
        a value that cannot be read (not a number, a flag in neither list, a group that matched nothing).
        """
        if self.regex is None:
            return {} if line == "" else None
        m = self.regex.fullmatch(line)
        if m is None:
            return None
        out: ReplyValues = {}
        for name, text in m.groupdict().items():
            if text is None:
                raise InstrumentReplyError(f"{what}: group {name!r} of {self.text!r} matched nothing in "
                                           f"{_show(line)}", instrument=instrument)
            if self.value == "number":
                out[name] = parse_number(text, instrument=instrument, what=f"{what}: {name} in {_show(line)}")
            elif self.value == "bool":
                if text in self.true_values:
                    out[name] = True
                elif self.false_values and text not in self.false_values:
                    raise InstrumentReplyError(f"{what}: {name} {text!r} in {_show(line)} is in neither "
                                               f"true_values {sorted(self.true_values)} nor false_values "
                                               f"{sorted(self.false_values)}", instrument=instrument)
                else:
                    out[name] = False
            else:
                out[name] = text
        if self.value == "text" and "identity" not in out:
            out["identity"] = line
        return out


class ControllerReplyError(InstrumentReplyError):
    """The controller answered with its error reply (the bench file's ``error`` pattern matched).

    Attributes
    ----------
    code : str
        The controller's error code (``""`` when the pattern has no ``code`` group).
    text : str
        The controller's error message.
    operation : str
        The operation whose command was refused.
    command : str
        The command as sent, without terminator.
    reply : str
        The whole reply line.
    """

    def __init__(self, *, instrument: str, code: str, text: str, operation: str, command: str, reply: str) -> None:
        self.code = code
        self.text = text
        self.operation = operation
        self.command = command
        self.reply = reply
        label = f"error {code}" if code else "error"
        super().__init__(f"{operation} {command!r} refused by the controller: {label}: {text}", instrument=instrument)


@dataclass(frozen=True)
class ErrorPattern:
    """The bench file's ``error`` pattern: groups ``message`` (required) and ``code`` (optional)."""

    text: str
    regex: re.Pattern[str]

    @classmethod
    def parse(cls, text: object, *, key_path: str) -> ErrorPattern:
        """Raises ConfigError for a bad regex, a missing ``message`` group or any other named group."""
        regex = _compile_regex(text, key_path)
        assert isinstance(text, str)
        names = set(regex.groupindex)
        allowed = "(?P<message>...) and optionally (?P<code>...)"
        if "message" not in names:
            raise ConfigError("the error pattern needs a (?P<message>...) group", key_path=key_path, value=text,
                              allowed=allowed)
        extra = sorted(names - {"code", "message"})
        if extra:
            raise ConfigError(f"the error pattern names unknown group(s) {', '.join(extra)}", key_path=key_path,
                              value=text, allowed=allowed)
        return cls(text=text, regex=regex)

    def match(self, line: str) -> tuple[str, str] | None:
        """``(code, message)`` when the line is an error reply, else None."""
        m = self.regex.fullmatch(line)
        if m is None:
            return None
        return (m.groupdict().get("code") or ""), (m.group("message") or "")


# ----------------------------------------------------------------------------------------------- commands


@dataclass(frozen=True)
class Command:
    """One operation's compiled template and reply pattern; ``key_path`` is its table in the bench file."""

    operation: str
    spec: OperationSpec
    template: Template
    reply: ReplyPattern
    key_path: str

    @property
    def expects_reply(self) -> bool:
        """False for ``reply = ""``: nothing is read after sending."""
        return self.reply.regex is not None


@dataclass(frozen=True)
class CommandSet:
    """Every operation of one instrument: command bytes out, reply values in.

    Attributes
    ----------
    kind : str
        ``delay_axis``, ``chopper`` or ``shutter``.
    instrument : str
        The instrument's name in the bench file, for every error.
    commands : dict
        Operation name -> :class:`Command`.
    error : ErrorPattern or None
        Checked before the operation's own pattern on every reply.
    identity : Command or None
        The identity query, when the bench file gives one.
    fixed_identity : str or None
        A fixed identity text, when the bench file gives one instead.
    encoding : str
        Text encoding of commands and replies.
    write_terminator : bytes
        Appended to every command.
    """

    kind: str
    instrument: str
    commands: dict[str, Command]
    error: ErrorPattern | None = None
    identity: Command | None = None
    fixed_identity: str | None = None
    encoding: str = "ascii"
    write_terminator: bytes = b"\r\n"
    _by_name: dict[str, Command] = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        self._by_name.update(self.commands)
        if self.identity is not None:
            self._by_name["identity"] = self.identity

    def has(self, operation: str) -> bool:
        """Whether the bench file gives this operation (``identity`` included)."""
        return operation in self._by_name

    def command(self, operation: str) -> Command:
        """The compiled operation. Raises KeyError naming it if the bench file does not give it."""
        try:
            return self._by_name[operation]
        except KeyError:
            raise KeyError(f"{self.instrument}: operation {operation!r} is not configured") from None

    def render(self, operation: str, values: Mapping[str, float] | None = None) -> str:
        """The command text of an operation, without terminator (ValueError/TypeError for bad values)."""
        return self.command(operation).template.render(values or {})

    def encode(self, operation: str, values: Mapping[str, float] | None = None) -> bytes:
        """The bytes to send for an operation: rendered template, encoded, plus the write terminator.

        Raises
        ------
        ValueError
            For a missing or non-finite value, or a rendered command that the encoding cannot hold or that
            contains the write terminator.
        TypeError
            For a value that is not a real number.
        """
        text = self.render(operation, values)
        try:
            data = text.encode(self.encoding)
        except UnicodeError as exc:  # UnicodeEncodeError, or the plain UnicodeError of codecs such as idna
            raise ValueError(f"{self.instrument}: {operation} {text!r} cannot be encoded as {self.encoding}") from exc
        if self.write_terminator in data:
            raise ValueError(f"{self.instrument}: {operation} {text!r} contains the write terminator")
        return data + self.write_terminator

    def expects_reply(self, operation: str) -> bool:
        """Whether a reply line is read after sending the operation."""
        return self.command(operation).expects_reply

    def parse(self, operation: str, line: bytes | str, *, sent: str = "") -> ReplyValues:
        """Values of a reply line (without its terminator) to an operation.

        Parameters
        ----------
        operation : str
            The operation the reply answers.
        line : bytes or str
            The reply line; bytes are decoded with :attr:`encoding` (strictly).
        sent : str
            The command as sent, for messages.

        Returns
        -------
        dict
            Group name -> value (empty for an acknowledgement).

        Raises
        ------
        ControllerReplyError
            When the line matches the ``error`` pattern.
        InstrumentReplyError
            When it cannot be decoded, does not match the operation's pattern, or holds a bad value. The
            message names the operation, the command, the pattern's key path, the pattern and the line.
        """
        cmd = self.command(operation)
        what = f"{operation} {sent!r}" if sent else operation
        if isinstance(line, (bytes, bytearray)):
            try:
                text = bytes(line).decode(self.encoding)
            except UnicodeError:  # UnicodeDecodeError, or the plain UnicodeError of idna, punycode...
                raise InstrumentReplyError(f"reply to {what} is not {self.encoding} text: {_show(bytes(line))}",
                                           instrument=self.instrument) from None
        else:
            text = line
        if self.error is not None:
            found = self.error.match(text)
            if found is not None:
                raise ControllerReplyError(instrument=self.instrument, code=found[0], text=found[1],
                                           operation=operation, command=sent, reply=text)
        values = cmd.reply.match(text, instrument=self.instrument, what=f"reply to {what}")
        if values is None:
            raise InstrumentReplyError(f"reply to {what} does not match {cmd.key_path}.reply "
                                       f"{cmd.reply.text!r}: got {_show(text)}", instrument=self.instrument)
        return values


def _compile_one(operation: str, spec: OperationSpec, table: object, key_path: str) -> Command:
    if not isinstance(table, Mapping):
        raise ConfigError("an operation is a table with send and reply", key_path=key_path, value=table,
                          allowed='{ send = "...", reply = "..." }')
    keys = _COMMAND_KEYS if spec.value == "bool" else _COMMAND_KEYS[:2]
    for key in table:
        if key not in keys:
            raise ConfigError("unknown key", key_path=f"{key_path}.{key}", value=table[key], allowed=", ".join(keys))
    for key in ("send", "reply"):
        if key not in table:
            raise ConfigError("required key is missing", key_path=f"{key_path}.{key}",
                              allowed='reply = "" when the controller sends nothing back'
                              if key == "reply" and spec.value == "none" else None)
    template = Template.parse(table["send"], allowed=spec.fields, key_path=f"{key_path}.send")
    reply = ReplyPattern.parse(table["reply"], spec, key_path=f"{key_path}.reply",
                               true_values=table.get("true_values"), false_values=table.get("false_values"))
    return Command(operation=operation, spec=spec, template=template, reply=reply, key_path=key_path)


def compile_commands(
    kind: str,
    commands: Mapping[str, Any],
    *,
    instrument: str,
    key_path: str,
    error: str | None = None,
    identity: str | Mapping[str, Any] | None = None,
    encoding: str = "ascii",
    write_terminator: str = "\r\n",
) -> CommandSet:
    """Check a bench file's command table for an instrument kind and compile it.

    Parameters
    ----------
    kind : str
        A key of :data:`OPERATIONS`.
    commands : mapping
        Operation name -> ``{send, reply[, true_values, false_values]}``.
    instrument : str
        The instrument's name, for reply errors.
    key_path : str
        Where the driver's options sit (``bench.delay_axis.options``); tables are under ``.commands``.
    error : str, optional
        The error-reply pattern.
    identity : str or mapping, optional
        A fixed identity text, or an identity query ``{send, reply}``.
    encoding : str
        Text encoding (any Python codec name).
    write_terminator : str
        Appended to every command.

    Raises
    ------
    ConfigError
        For an unknown kind or operation, a missing required operation (or both/neither of a one-of pair),
        and every problem :meth:`Template.parse` and :meth:`ReplyPattern.parse` find; also for an unknown
        encoding, an empty or unencodable terminator, or literal text the encoding cannot hold.
    """
    if kind not in OPERATIONS:
        raise ValueError(f"unknown instrument kind {kind!r}; kinds: {', '.join(OPERATIONS)}")
    specs = OPERATIONS[kind]
    try:
        # rot13, base64, zlib... are codecs but not text encodings: str.encode refuses them (LookupError)
        text_codec = getattr(codecs.lookup(encoding), "_is_text_encoding", True)
    except (LookupError, TypeError, ValueError):  # ValueError: a NUL in the name
        text_codec = False
    if not text_codec:
        raise ConfigError("unknown text encoding", key_path=f"{key_path}.encoding", value=encoding,
                          allowed="a Python codec name such as ascii, latin-1, utf-8") from None
    if not isinstance(write_terminator, str) or not write_terminator:
        raise ConfigError("the write terminator must be non-empty text", key_path=f"{key_path}.write_terminator",
                          value=write_terminator, allowed='"\\r\\n", "\\n" or "\\r"')
    try:
        terminator = write_terminator.encode(encoding)
    except UnicodeError:  # also the codec "undefined", which refuses everything
        raise ConfigError(f"the write terminator cannot be encoded as {encoding}",
                          key_path=f"{key_path}.write_terminator", value=write_terminator) from None
    if not isinstance(commands, Mapping):
        raise ConfigError("commands must be a table of operations", key_path=f"{key_path}.commands", value=commands,
                          allowed=", ".join(specs))
    compiled: dict[str, Command] = {}
    for operation, table in commands.items():
        where = f"{key_path}.commands.{operation}"
        if operation not in specs:
            raise ConfigError(f"unknown operation for a {kind}", key_path=where, value=operation,
                              allowed=", ".join(specs))
        compiled[operation] = _compile_one(operation, specs[operation], table, where)
    for operation, spec in specs.items():
        if spec.required and operation not in compiled:
            raise ConfigError(f"required operation is missing ({spec.doc})",
                              key_path=f"{key_path}.commands.{operation}", allowed='{ send = "...", reply = "..." }')
    for group in ONE_OF.get(kind, ()):
        given = [op for op in group if op in compiled]
        if len(given) != 1:
            raise ConfigError(f"give exactly one of {' or '.join(group)}", key_path=f"{key_path}.commands",
                              value=given or None, allowed=" or ".join(group))
    identity_cmd: Command | None = None
    fixed: str | None = None
    if isinstance(identity, str):
        if not identity.strip():
            raise ConfigError("a fixed identity must be non-empty text", key_path=f"{key_path}.identity",
                              value=identity)
        fixed = identity
    elif isinstance(identity, Mapping):
        identity_cmd = _compile_one("identity", IDENTITY, identity, f"{key_path}.identity")
    elif identity is not None:
        raise ConfigError("identity is a fixed text or a query table", key_path=f"{key_path}.identity",
                          value=identity, allowed='"stage 12" or { send = "...", reply = "..." }')
    error_pattern = ErrorPattern.parse(error, key_path=f"{key_path}.error") if error is not None else None
    for cmd in [*compiled.values(), *([identity_cmd] if identity_cmd else [])]:
        literal = "".join(piece[0] for piece in cmd.template.pieces)
        try:
            encoded = literal.encode(encoding)
        except UnicodeError:
            raise ConfigError(f"the template holds text that {encoding} cannot encode",
                              key_path=f"{cmd.key_path}.send", value=cmd.template.text) from None
        if terminator in encoded:
            raise ConfigError("the template contains the write terminator", key_path=f"{cmd.key_path}.send",
                              value=cmd.template.text)
    return CommandSet(kind=kind, instrument=instrument, commands=compiled, error=error_pattern,
                      identity=identity_cmd, fixed_identity=fixed, encoding=encoding, write_terminator=terminator)
