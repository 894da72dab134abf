"""Audit plans: a TOML file naming inputs, shared settings and jobs, checked before anything runs.

A plan (read with the standard library's ``tomllib``) has three parts::

    [settings]          # options every job shares; the commands' option names without the dashes
    seed = 2026         # the plan's root seed: each job's --seed is job_seed(seed, job name)
    confidence = 0.95

    [inputs]            # named inputs; paths relative to the plan file's folder
    districts = { path = "vale_county.gpkg", layer = "districts", id-field = "district_id" }

    [[jobs]]            # one table per job
    name = "district-areas"
    kind = "area"       # area | overlap | coverage | integrate
    file = "districts"  # the command's positionals by their names, each naming an input

:func:`read_plan` turns every job into the complete command line of its command
(:attr:`PlanJob.argv`, absolute paths, no output options) and checks it with that command's
own argparse parser, so every value is checked exactly as on the command line.  Every error
is collected with the line it comes from (``PLAN.toml:12: jobs[2] (clinic-reach): unknown key
'at_least'; did you mean 'at-least'?``) and raised together as one :class:`PlanError`.
:func:`check_plan` adds the checks that open the input files (layers and fields).

Rules the plan follows:

* ``[settings]`` holds only options that all four job commands take (plane, sampling,
  confidence, units, workers, ...) and ``seed``; an option only some commands take goes into
  the jobs that take it.  A job's own key overrides the setting of the same name; a job's
  ``points`` drops a shared ``tolerance`` and its ``tolerance`` a shared ``points`` (the two
  exclude each other).
* An input's ``path``, ``layer``, ``id-field``, ``input-crs``, ``input-encoding`` and
  ``open-option`` become the options of the role the job gives it (``--regions-layer``,
  ``--zones-id-field``, ``--density-layer``, ...); jobs do not set those options themselves.
  An input used as a density passes its path, layer, input CRS and open options; its id-field
  is not used there.
* Output options (``output``, ``format``, ``trace``, ``plot``), ``quiet``, ``verbose`` and
  ``fail-on-shortfall`` belong to ``areamc audit`` itself, not to a job.
* Job names are ``[a-z0-9_-]+`` and unique: they name result rows, layers and seeds.
* Without its own ``seed``, a job needs ``seed`` in ``[settings]``: a plan always replays, so a
  resumed audit ends with the results of an uninterrupted one.

Paths: a plain local path is taken relative to the plan's folder and must exist; the archive
of a ``zip://ARCHIVE!MEMBER`` path is taken relative to the folder too; other forms GDAL
opens (``/vsi...`` paths, URLs, a path through a ``.zip``) pass unchanged and are left to the
reader.  No geometry is read here, so no CRS is involved.
"""

from __future__ import annotations

import argparse
import difflib
import hashlib
import os
import re
import tomllib
from dataclasses import dataclass

from .errors import InputError, OptionError

__all__ = ["Plan", "PlanJob", "PlanError", "read_plan", "check_plan", "job_seed", "scan_lines", "KINDS"]

#: The job kinds: the commands a plan's jobs run.
KINDS = ("area", "overlap", "coverage", "integrate")
#: Keys of an input's table, and the option suffix each feeds (``--regions-`` + suffix).
INPUT_KEYS = ("path", "layer", "id-field", "input-crs", "input-encoding", "open-option")
#: Options the audit itself owns, with what to do instead.
AUDIT_OWNED = {
    "output": "the audit writes every result into its results folder",
    "format": "the audit writes every result into its results folder",
    "trace": "the audit writes every result into its results folder",
    "plot": "the audit draws its pictures into report.html",
    "quiet": "give --quiet to areamc audit",
    "verbose": "give --verbose to areamc audit",
    "fail-on-shortfall": "give --fail-on-shortfall to areamc audit",
    "help": "not an option of a plan",
}
#: The option prefix each role of an input gives its layer options (``file`` has none).
ROLE_PREFIX = {"file": "", "zones": "zones-", "other": "other-", "regions": "regions-", "density": "density-"}
_NAME = re.compile(r"^[a-z0-9_-]+$")
_SCHEME = re.compile(r"^([A-Za-z][A-Za-z0-9+.-]+)://")


class PlanError(InputError):
    """Raised when a plan cannot run: every error found, each ``PATH:LINE: where: what``.

    `lines` holds one error per entry, sorted by line; the message is those lines joined by
    newlines.  The command line prints each as its own ``areamc: error:`` line (the one
    exception to the one-line rule: a plan's errors are listed together so that one
    ``--check`` finds them all), with exit status 2.
    """

    def __init__(self, lines) -> None:
        self.lines = tuple(lines)
        super().__init__("\n".join(self.lines))


@dataclass(frozen=True)
class PlanJob:
    """One job of a plan.

    Attributes
    ----------
    name : str
        The job's name (``[a-z0-9_-]+``, unique in the plan).
    kind : str
        ``area``, ``overlap``, ``coverage`` or ``integrate``: the command it runs.
    argv : tuple of str
        The complete command line for :func:`areamc.cli.main` / ``build_parser().parse_args``:
        the kind, the input paths (absolute), every option (``--regions-layer districts``,
        ``--seed N``, ...); no output option and no ``--format``.
    line : int
        Line of the job's ``[[jobs]]`` header in the plan (1-based).
    inputs : tuple of str
        Names of the inputs the job reads, in the order of its positionals, then the density.
    """

    name: str
    kind: str
    argv: tuple[str, ...]
    line: int
    inputs: tuple[str, ...]


@dataclass(frozen=True)
class Plan:
    """A checked plan.

    Attributes
    ----------
    path : str
        Absolute path of the plan file.
    folder : str
        Absolute path of its folder (relative input paths start here).
    sha256 : str
        SHA-256 of the plan file's bytes (hex).
    settings : dict
        ``[settings]`` as written (``seed`` included).
    inputs : dict of str to dict
        Each input's table as written, with ``path`` made absolute where it is a local path.
    jobs : tuple of PlanJob
        The jobs, in the plan's order.
    """

    path: str
    folder: str
    sha256: str
    settings: dict
    inputs: dict[str, dict]
    jobs: tuple[PlanJob, ...]

    @property
    def seed(self) -> int | None:
        """The plan's root seed (``[settings]`` ``seed`` as a whole number), or None."""
        seed = self.settings.get("seed")
        return None if seed is None else int(seed)


# ----------------------------------------------------------------------------------- job seeds


def job_seed(plan_seed: int, name: str) -> int:
    """The seed of job `name` in a plan whose root seed is `plan_seed`.

    The key is the job's name, not its position, so adding, removing or reordering other jobs
    leaves a job's results unchanged.  Derivation (numpy's ``SeedSequence``, numpy
    documentation, "Parallel Random Number Generation")::

        digest = SHA-256(name encoded as UTF-8)
        key = (int.from_bytes(digest[0:4], "big"), int.from_bytes(digest[4:8], "big"))
        seed = SeedSequence(plan_seed, spawn_key=key).generate_state(1, numpy.uint64)[0]

    i.e. :func:`areamc.seeds.child_seed` of the root at that key, then one 64-bit word of its
    state.  The result is a Python int in [0, 2**64), the same on every machine and run.

    Raises
    ------
    OptionError
        For a negative or non-integral `plan_seed` (parameter ``seed``).
    """
    import numpy as np

    from .seeds import child_seed, make_seed

    root = make_seed(plan_seed)
    digest = hashlib.sha256(str(name).encode("utf-8")).digest()
    key = (int.from_bytes(digest[0:4], "big"), int.from_bytes(digest[4:8], "big"))
    return int(child_seed(root, *key).generate_state(1, np.uint64)[0])


# ------------------------------------------------------------------------------ line scanner


def scan_lines(text: str) -> dict[tuple, int]:
    """Where each key of a TOML document is written: key path -> line (1-based).

    Paths are tuples of keys, with an array's position as an int (``("jobs", 1, "claim")`` is
    the second ``[[jobs]]`` table's ``claim``, ``("jobs", 1, "at-least", 0)`` the first element
    of its list).  Table headers give the header's line.  Handles comments, quoted and dotted
    keys, inline tables, multi-line arrays and strings, and arrays of tables nested under
    arrays of tables.  Meant for documents ``tomllib`` has accepted; on anything else it keeps
    what it found so far.
    """
    scanner = _Scanner(text)
    try:
        scanner.document()
    except (IndexError, ValueError):
        pass
    return scanner.lines


_PUNCT = "[]{}=,"


def _tokens(text: str) -> list[tuple[str, str, int, int]]:
    """Tokens ``(kind, value, line, offset)``: kind is one of ``[]{}=,`` itself, ``nl``,
    ``str`` (a quoted string, value unquoted) or ``bare`` (anything else, dots included)."""
    out = []
    i, line, n = 0, 1, len(text)
    while i < n:
        c = text[i]
        if c == "\n":
            out.append(("nl", "\n", line, i))
            line += 1
            i += 1
        elif c in " \t\r":
            i += 1
        elif c == "#":
            while i < n and text[i] != "\n":
                i += 1
        elif c in _PUNCT:
            out.append((c, c, line, i))
            i += 1
        elif c in "\"'":
            start_line, start = line, i
            triple = text.startswith(c * 3, i)
            if triple:
                end = text.find(c * 3, i + 3) if c == "'" else _basic_end(text, i + 3, c * 3)
                if end < 0:
                    end = n
                while end + 3 < n + 1 and text.startswith(c, end + 3) and text[end:end + 4] == c * 4:
                    end += 1  # up to two quotes may close the string's content
                value = text[i + 3:end]
                i = end + 3
            else:
                end = text.find(c, i + 1) if c == "'" else _basic_end(text, i + 1, c)
                if end < 0:
                    end = n
                value = text[i + 1:end]
                if c == '"':
                    value = _unescape(value)
                i = end + 1
            line += text.count("\n", start, min(i, n))
            out.append(("str", value, start_line, start))
        else:
            start = i
            while i < n and text[i] not in " \t\r\n#" + _PUNCT + "\"'":
                i += 1
            out.append(("bare", text[start:i], line, start))
    return out


def _basic_end(text: str, i: int, close: str) -> int:
    """Index where a basic (backslash-escaping) string that starts at `i` ends, or -1."""
    n = len(text)
    while i < n:
        if text[i] == "\\":
            i += 2
            continue
        if text.startswith(close, i):
            return i
        if text[i] == "\n" and len(close) == 1:
            return i
        i += 1
    return -1


def _unescape(value: str) -> str:
    """The common escapes of a basic string's key (``\\"``, ``\\\\``); others kept as written."""
    return value.replace('\\"', '"').replace("\\\\", "\\")


class _Scanner:
    """A recursive scan over :func:`_tokens` that records each key path's line."""

    def __init__(self, text: str) -> None:
        self.toks = _tokens(text)
        self.pos = 0
        self.lines: dict[tuple, int] = {}
        self.arrays: dict[tuple, int] = {}  # array-of-tables path -> index of its last table

    def peek(self, k: int = 0):
        at = self.pos + k
        return self.toks[at] if at < len(self.toks) else ("eof", "", self.toks[-1][2] if self.toks else 1, -1)

    def take(self):
        tok = self.peek()
        self.pos += 1
        return tok

    def skip_newlines(self) -> None:
        while self.peek()[0] == "nl":
            self.pos += 1

    def note(self, path: tuple, line: int) -> None:
        self.lines.setdefault(path, line)

    def key(self, stop: str) -> tuple[list[str], int]:
        """A dotted key up to `stop` (``=`` or ``]``); the stop token is not consumed."""
        parts, line = [], self.peek()[2]
        while self.peek()[0] not in (stop, "nl", "eof"):
            kind, value, _, _ = self.take()
            if kind == "str":
                parts.append(value)
            elif kind == "bare":
                parts.extend(p for p in value.split(".") if p)
            else:
                raise ValueError(value)
        return parts, line

    def resolve(self, parts) -> tuple:
        """A header's path, with the current index of every array of tables along it."""
        out: tuple = ()
        for part in parts:
            out += (part,)
            if out in self.arrays:
                out += (self.arrays[out],)
        return out

    def document(self) -> None:
        table: tuple = ()
        while True:
            self.skip_newlines()
            kind, _, line, offset = self.peek()
            if kind == "eof":
                return
            if kind == "[":
                nxt = self.peek(1)
                double = nxt[0] == "[" and nxt[3] == offset + 1
                self.pos += 2 if double else 1
                parts, _ = self.key("]")
                self.take()
                if double:
                    self.take()
                    base = self.resolve(parts[:-1]) + (parts[-1],)
                    self.note(base, line)
                    index = self.arrays.get(base, -1) + 1
                    self.arrays[base] = index
                    table = base + (index,)
                else:
                    table = self.resolve(parts)
                self.note(table, line)
                self.rest_of_line()
                continue
            parts, line = self.key("=")
            if self.take()[0] != "=":
                raise ValueError("=")
            path = table + tuple(parts)
            for cut in range(1, len(parts) + 1):  # a dotted key also writes its tables
                self.note(table + tuple(parts[:cut]), line)
            self.value(path)
            self.rest_of_line()

    def rest_of_line(self) -> None:
        while self.peek()[0] not in ("nl", "eof"):
            self.pos += 1

    def value(self, path: tuple) -> None:
        kind, _, line, _ = self.peek()
        if kind == "[":
            self.take()
            index = 0
            while True:
                self.skip_newlines()
                if self.peek()[0] in ("]", "eof"):
                    self.take()
                    return
                self.note(path + (index,), self.peek()[2])
                self.value(path + (index,))
                index += 1
                self.skip_newlines()
                if self.peek()[0] == ",":
                    self.take()
        elif kind == "{":
            self.take()
            while True:
                if self.peek()[0] in ("}", "eof", "nl"):
                    self.take()
                    return
                if self.peek()[0] == ",":
                    self.take()
                    continue
                parts, kline = self.key("=")
                self.take()
                for cut in range(1, len(parts) + 1):
                    self.note(path + tuple(parts[:cut]), kline)
                self.value(path + tuple(parts))
        else:
            self.take()
            # a date and time written with a space is two bare tokens on one line
            while self.peek()[0] == "bare" and self.peek()[2] == line:
                self.take()


# ------------------------------------------------------------------------------------ reading


class _Errors:
    """Errors found so far, each with its line; rendered ``PATH:LINE: text``."""

    def __init__(self, path: str, lines: dict[tuple, int]) -> None:
        self.path = path
        self.where = lines
        self.items: list[tuple[int, str]] = []

    def line(self, *paths: tuple) -> int:
        """Line of the first of `paths` that is written down, trying shorter prefixes (else 1)."""
        for path in paths:
            path = tuple(path)
            while path:
                if path in self.where:
                    return self.where[path]
                path = path[:-1]
        return 1

    def add(self, line: int, text: str) -> None:
        text = " ".join(text.split())  # one line per error
        if (line, text) not in self.items:
            self.items.append((line, text))

    def raise_any(self) -> None:
        if self.items:
            ordered = sorted(self.items, key=lambda item: item[0])
            raise PlanError([f"{self.path}:{line}: {text}" for line, text in ordered])


def _suggest(word: str, choices) -> str:
    close = difflib.get_close_matches(str(word), sorted(choices), n=1, cutoff=0.6)
    return f"; did you mean {close[0]!r}?" if close else ""


def _show(value) -> str:
    """A value as TOML writes it, for messages."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(_show(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {_show(v)}" for k, v in value.items()) + " }"
    return str(value)


def _type_name(value) -> str:
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, (int, float)):
        return "a number"
    if isinstance(value, str):
        return "text"
    return "a date or time"


_PARSER = None


def _command_parsers() -> dict[str, argparse.ArgumentParser]:
    """Each job kind's own argparse parser (from :func:`areamc.cli.build_parser`), built once."""
    global _PARSER
    from .cli import build_parser

    if _PARSER is None:
        _PARSER = build_parser()
    for action in _PARSER._actions:
        if isinstance(action, argparse._SubParsersAction):
            return {kind: action.choices[kind] for kind in KINDS}
    raise RuntimeError("areamc.cli.build_parser() has no sub-commands")  # pragma: no cover


@dataclass(frozen=True)
class _Command:
    """What a plan may say about one command: its positionals and its options by key."""

    kind: str
    positionals: tuple[str, ...]
    required: tuple[str, ...]
    options: dict[str, argparse.Action]  # key (long flag without dashes) -> action
    layer_keys: frozenset[str]  # keys an input supplies (zones-layer, density-input-crs, ...)


def _commands() -> dict[str, _Command]:
    out = {}
    for kind, parser in _command_parsers().items():
        positionals = tuple(a.dest for a in parser._actions if not a.option_strings)
        required = tuple(a.dest for a in parser._actions if not a.option_strings and a.nargs is None)
        options = {}
        for action in parser._actions:
            longs = [s for s in action.option_strings if s.startswith("--")]
            if longs:
                options[longs[0][2:]] = action
        layer_keys = frozenset(f"{prefix}{key}" for prefix in ROLE_PREFIX.values()
                               for key in INPUT_KEYS if f"{prefix}{key}" in options) - {"density"}
        out[kind] = _Command(kind, positionals, required, options, layer_keys)
    return out


def _job_keys(command: _Command) -> set[str]:
    """Keys a job of this command may hold."""
    return ({"name", "kind", *command.positionals}
            | {k for k in command.options if k not in AUDIT_OWNED and k not in command.layer_keys})


def _shared_keys(commands: dict[str, _Command]) -> set[str]:
    """Keys ``[settings]`` may hold: options every job command takes, but not inputs' or the audit's."""
    common = set.intersection(*(set(c.options) for c in commands.values()))
    layer = set().union(*(c.layer_keys for c in commands.values()))
    return {k for k in common if k not in AUDIT_OWNED and k not in layer} | {"seed"}


def _is_plain_local(text: str) -> bool:
    from .load import gdal_path

    return not text.startswith("/vsi") and not _SCHEME.match(text) and gdal_path(text) == text


def _resolve_path(text: str, folder: str) -> str:
    """`text` made absolute against `folder` where it is local (a plain path, or a zip:// archive)."""
    if text.startswith("/vsi"):
        return text
    match = re.match(r"^(zip(?:\+file)?)://([^!]*)(.*)$", text, re.DOTALL)
    if match:
        scheme, archive, member = match.groups()
        if archive and not os.path.isabs(archive):
            archive = os.path.normpath(os.path.join(folder, archive))
        return f"{scheme}://{archive}{member}"
    if _SCHEME.match(text):
        return text
    return os.path.normpath(os.path.join(folder, os.path.expanduser(text)))


def read_plan(path) -> Plan:
    """Read and check the plan at `path` (a TOML file); see the module's description.

    Every job's command line is parsed by its command's own parser, and the checks the command
    makes before reading any file (points against tolerance, the point cap, the sampler, a
    radius, a density expression) are made too.  No input file is opened (only whether a local
    path exists is checked); :func:`check_plan` also opens them.

    Returns
    -------
    Plan
        With each job's complete command line (:attr:`PlanJob.argv`).

    Raises
    ------
    PlanError
        Listing every error, sorted by line, each ``PATH:LINE: where: what``.
    """
    return _read(path, files=False)


def check_plan(path) -> Plan:
    """:func:`read_plan`, then open every local vector input: the file must be readable, its
    ``layer`` must exist, and the fields a plan names (``id-field``; a job's ``radius-field`` on
    its zones and ``count-field`` on its block density) must be attributes of that layer.
    This is what ``areamc audit --check`` runs.  Inputs in other path forms (URLs, ``/vsi...``)
    and rasters are left to the reader.

    Raises
    ------
    PlanError
        Listing every error, sorted by line.
    """
    return _read(path, files=True)


def _read(path, *, files: bool) -> Plan:
    shown = os.fspath(path)
    try:
        with open(shown, "rb") as handle:
            data = handle.read()
    except OSError as err:
        raise PlanError([f"{shown}: cannot read the plan: {err.strerror or err}"]) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as err:
        line = data[:err.start].count(b"\n") + 1
        raise PlanError([f"{shown}:{line}: the plan is not UTF-8 text (TOML files are UTF-8)"]) from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        message = str(err)
        found = re.search(r"at line (\d+)", message)
        line = int(found.group(1)) if found else text.count("\n") + 1
        message = re.sub(r"\s*\((at line \d+, column \d+|at end of document)\)", "", message)
        raise PlanError([f"{shown}:{line}: not valid TOML: {message}"]) from None
    errors = _Errors(shown, scan_lines(text))
    absolute = os.path.abspath(shown)
    folder = os.path.dirname(absolute)
    commands = _commands()

    for key in doc:
        if key not in ("settings", "inputs", "jobs"):
            line = errors.line((key,))
            if key in _shared_keys(commands):
                errors.add(line, f"{key!r} is outside any table: shared options belong in [settings]")
            elif key in INPUT_KEYS:
                errors.add(line, f"{key!r} is outside any table: it belongs in an input's table in [inputs]")
            else:
                errors.add(line, f"unknown top-level key {key!r}; a plan has [settings], [inputs] and "
                                 f"[[jobs]]{_suggest(key, ('settings', 'inputs', 'jobs'))}")
    settings = _check_settings(doc.get("settings", {}), commands, errors)
    inputs = _check_inputs(doc.get("inputs", {}), folder, commands, errors)
    checked = _check_jobs(doc.get("jobs"), settings, inputs, commands, folder, errors,
                          settings_ok=isinstance(doc.get("settings", {}), dict))
    inputs = {k: v for k, v in inputs.items() if v is not None}
    if files:
        _check_files(inputs, checked, errors)
    errors.raise_any()
    return Plan(path=absolute, folder=folder, sha256=hashlib.sha256(data).hexdigest(),
                settings=dict(doc.get("settings", {})), inputs=inputs,
                jobs=tuple(c.job for c in checked if c.job is not None))


def _check_settings(settings, commands, errors: _Errors) -> dict:
    """The valid part of ``[settings]`` (key -> value); errors for the rest."""
    if not isinstance(settings, dict):
        errors.add(errors.line(("settings",)), f"settings must be a table ([settings]), got {_type_name(settings)}")
        return {}
    shared = _shared_keys(commands)
    out = {}
    for key, value in settings.items():
        line = errors.line(("settings", key))
        if key in shared:
            out[key] = value
            continue
        takers = [kind for kind, c in commands.items() if key in _job_keys(c) and key not in ("name", "kind")]
        if key in ("name", "kind") or key in ("file", "zones", "other", "regions"):
            why = f"{key!r} belongs in a [[jobs]] table"
        elif takers:
            why = (f"{key!r} is taken by {' and '.join(takers)} only; [settings] holds only options all four "
                   "job commands share: put it in the jobs that take it")
        elif key in INPUT_KEYS:
            why = f"{key!r} belongs in an input's table in [inputs]"
        elif key in AUDIT_OWNED:
            why = f"{key!r} is not set in a plan: {AUDIT_OWNED[key]}"
        else:
            why = (f"unknown key {key!r} ([settings] holds options all four job commands share)"
                   f"{_suggest(key, shared)}")
        errors.add(line, f"settings: {why}")
    if "seed" in out:
        seed = out["seed"]
        if isinstance(seed, str) and seed.strip().isdigit():
            out["seed"] = seed = int(seed.strip())
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            errors.add(errors.line(("settings", "seed")), f"settings: seed = {_show(seed)}: expected a "
                       "non-negative whole number (or its digits as text, for seeds beyond 64 bits)")
            out.pop("seed")
    return out


def _check_inputs(inputs, folder: str, commands, errors: _Errors) -> dict[str, dict]:
    """Every input: name -> its table (path made absolute where local), or None when it has errors."""
    if not isinstance(inputs, dict):
        errors.add(errors.line(("inputs",)), f"inputs must be a table ([inputs]), got {_type_name(inputs)}")
        return {}
    options = set().union(*(set(c.options) for c in commands.values()))
    out = {}
    for name, table in inputs.items():
        where = f"inputs.{name}"
        line = errors.line(("inputs", name))
        out[name] = None
        if not isinstance(table, dict):
            hint = f' (write {name} = {{ path = {_show(table)} }})' if isinstance(table, str) else ""
            errors.add(line, f"{where}: an input is a table with a path, got {_type_name(table)}{hint}")
            continue
        ok = True
        for key, value in table.items():
            kline = errors.line(("inputs", name, key))
            if key not in INPUT_KEYS:
                if key in options or key == "seed":
                    why = f"{key!r} is an option, not an input key: put it in [settings] or in a job"
                else:
                    why = f"unknown key {key!r} (an input takes {', '.join(INPUT_KEYS)}){_suggest(key, INPUT_KEYS)}"
                errors.add(kline, f"{where}: {why}")
                ok = False
            elif key == "open-option":
                values = [value] if isinstance(value, str) else value
                if not isinstance(values, list) or not all(isinstance(v, str) and "=" in v for v in values):
                    errors.add(kline, f"{where}: open-option = {_show(value)}: expected a list of \"KEY=VALUE\" "
                                      "texts")
                    ok = False
            elif not isinstance(value, str) or not value.strip():
                errors.add(kline, f"{where}: {key} = {_show(value)}: expected text, got {_type_name(value)}"
                           + (' (write "EPSG:4326")' if key == "input-crs" and isinstance(value, int) else ""))
                ok = False
        if "path" not in table:
            errors.add(line, f"{where}: no path (every input names its file: path = \"...\", relative to the "
                             "plan's folder)")
            continue
        if not ok or not isinstance(table["path"], str):
            continue
        resolved = _resolve_path(table["path"], folder)
        if _is_plain_local(resolved) and not os.path.exists(resolved):
            errors.add(errors.line(("inputs", name, "path")),
                       f"{where}: path {_show(table['path'])}: no such file (looked for {resolved})")
            continue
        entry = dict(table)
        entry["path"] = resolved
        if isinstance(entry.get("open-option"), str):
            entry["open-option"] = [entry["open-option"]]
        out[name] = entry
    return out


@dataclass
class _Segment:
    """Part of a job's command line, and the plan key it comes from."""

    key: str
    line: int
    tokens: list[str]
    scope: str  # "job", "settings" or "input:NAME"
    value: object = None
    flag: str = ""


def _tokens_for(key: str, value, action: argparse.Action, flag: str) -> list[str]:
    """The command-line words of option `flag` for a plan value; ValueError says what is wrong."""
    if action.nargs == 0:
        if not isinstance(value, bool):
            raise ValueError(f"expected true or false, got {_type_name(value)}")
        return [flag] if value else []
    repeat = isinstance(action, argparse._AppendAction)
    if isinstance(value, list):
        if not repeat:
            raise ValueError("takes one value, not a list")
        values = value
    else:
        values = [value]
    out = []
    for item in values:
        if isinstance(item, bool):
            raise ValueError(f"expected a value, not {_show(item)} (true/false is only for on/off options)")
        if isinstance(item, (int, float)):
            word = repr(item) if isinstance(item, float) else str(item)
        elif isinstance(item, str):
            word = item
        else:
            raise ValueError(f"expected a number or text, got {_type_name(item)}")
        out.extend([f"{flag}={word}"] if word.startswith("-") else [flag, word])
    return out


@dataclass(frozen=True)
class _Checked:
    """A job of a known kind, with what the file checks need: its position, the input of each
    role and the fields it names; `job` is None when the job has errors."""

    job: PlanJob | None
    index: int
    label: str
    roles: dict
    fields: dict


def _check_jobs(jobs, settings: dict, inputs: dict, commands, folder: str, errors: _Errors, *,
                settings_ok: bool = True) -> list[_Checked]:
    if jobs is None:
        errors.add(1, "the plan has no jobs: add a [[jobs]] table for each (name, kind and its inputs)")
        return []
    if not isinstance(jobs, list) or not all(isinstance(j, dict) for j in jobs):
        errors.add(errors.line(("jobs",)), "jobs must be tables: write each job as a [[jobs]] table")
        return []
    if not jobs:
        errors.add(errors.line(("jobs",)), "the plan has no jobs: add a [[jobs]] table for each")
        return []
    without_seed = [j for j in jobs if "seed" not in j]
    if without_seed and settings_ok and "seed" not in settings and "seed" not in _raw_settings(errors):
        errors.add(errors.line(("settings",)), "settings: no seed: give seed = N (each job's seed is derived "
                   "from it and the job's name, so that the audit replays and resumes exactly), or a seed in "
                   "every job")
    out, names = [], {}
    for index, job in enumerate(jobs):
        built = _check_job(index, job, settings, inputs, commands, folder, errors, names)
        if built is not None:
            out.append(built)
    return out


def _raw_settings(errors: _Errors) -> set:
    """Keys written in [settings] (a bad seed there is reported as such, not as a missing one)."""
    return {path[1] for path in errors.where if len(path) == 2 and path[0] == "settings"}


def _unknown_job_key(key: str, kind: str, command: _Command, commands) -> str:
    """Why a job of `kind` cannot hold `key`, and what to write instead."""
    allowed = _job_keys(command)
    others = [k for k, c in commands.items() if k != kind and key in _job_keys(c)]
    if key in AUDIT_OWNED:
        return f"{key!r} is not set in a plan: {AUDIT_OWNED[key]}"
    if key in INPUT_KEYS or key in command.layer_keys or any(key in c.layer_keys for c in commands.values()):
        suffix = next((s for s in INPUT_KEYS if key.endswith(s)), key)
        return f"{key!r} comes from the input: set {suffix} in the input's table in [inputs]"
    if any(key in c.positionals for c in commands.values()):
        return (f"{key!r} is not an input of {kind}: it names its inputs {' and '.join(command.positionals)}"
                f"{_suggest(key, command.positionals)}")
    if others:
        return f"{key!r} is not an option of {kind} (it is one of {' and '.join(others)}){_suggest(key, allowed)}"
    return f"unknown key {key!r}{_suggest(key, allowed)}"


def _check_job(index: int, job: dict, settings: dict, inputs: dict, commands, folder: str,
               errors: _Errors, names: dict) -> _Checked | None:
    here = ("jobs", index)
    header = errors.line(here)
    name = job.get("name")
    label = f"jobs[{index + 1}]" + (f" ({name})" if isinstance(name, str) else "")
    ok = True
    if name is None:
        errors.add(header, f"{label}: no name (every job has name = \"...\", of a-z, 0-9, _ and -)")
        ok = False
    elif not isinstance(name, str) or not _NAME.match(name):
        errors.add(errors.line(here + ("name",)), f"{label}: name = {_show(name)}: a job's name is text of "
                   "a-z, 0-9, _ and - (it names result rows, layers and the job's seed)")
        ok = False
    elif name in names:
        errors.add(errors.line(here + ("name",)), f"{label}: name {name!r} is already used by "
                   f"jobs[{names[name][0] + 1}] (line {names[name][1]}); job names are unique")
        ok = False
    else:
        names[name] = (index, header)
    kind = job.get("kind")
    if kind is None:
        errors.add(header, f"{label}: no kind (kind = one of {', '.join(KINDS)})")
        return None
    if kind not in KINDS:
        extra = " (inspect runs no estimate)" if kind == "inspect" else _suggest(kind, KINDS)
        errors.add(errors.line(here + ("kind",)), f"{label}: kind = {_show(kind)} is not one of "
                   f"{', '.join(KINDS)}{extra}")
        return None
    command = commands[kind]
    allowed = _job_keys(command)
    segments: list[_Segment] = []
    used: list[str] = []
    roles: dict[str, str] = {}
    paths: list[str] = []

    for key in job:
        if key not in allowed:
            errors.add(errors.line(here + (key,)), f"{label}: {_unknown_job_key(key, kind, command, commands)}")
            ok = False

    # inputs by their roles: the positionals, then the density
    for role in command.positionals:
        value = job.get(role)
        if value is None:
            if role in command.required:
                errors.add(header, f"{label}: no {role} (the {role.upper()} input of {kind}: {role} = \"NAME\", "
                                   "an input of [inputs])")
                ok = False
                paths.append(_STAND_IN)
            continue
        if _use_input(label, role, value, inputs, command, here, errors, segments, used, paths):
            roles[role] = value
        else:
            ok = False
            paths.append(_STAND_IN)
    density = job.get("density")
    if "density" in command.options:
        if density is None and command.options["density"].required:
            errors.add(header, f"{label}: no density (an input name, such as blocks or a raster, or a density "
                               "expression)")
            ok = False
        elif density is not None:
            if _use_density(label, density, job, inputs, command, folder, here, errors, segments, used):
                if density in used:
                    roles["density"] = density
            else:
                ok = False

    # options: the shared settings, then the job's own
    for key, value in settings.items():
        if key == "seed" or key in job:
            continue
        if (key == "points" and "tolerance" in job) or (key == "tolerance" and "points" in job):
            continue
        found = _option_segments(key, value, command, ("settings", key), "settings", label, errors)
        ok = ok and found is not None
        segments.extend(found or [])
    for key, value in job.items():
        if key in ("name", "kind", "density") or key in command.positionals or key not in allowed:
            continue
        found = _option_segments(key, value, command, here + (key,), "job", label, errors)
        ok = ok and found is not None
        segments.extend(found or [])
    if "seed" not in job and "seed" in settings and isinstance(name, str) and _NAME.match(name):
        segments.append(_Segment("seed", errors.line(("settings", "seed")),
                                 ["--seed", str(job_seed(settings["seed"], name))], "settings",
                                 settings["seed"], "--seed"))

    parsed = _parse(kind, paths, segments, label, header, command, errors, complete=ok)
    fields = {key: job[key] for key in ("radius-field", "count-field") if isinstance(job.get(key), str)}
    if not (ok and parsed):
        return _Checked(None, index, label, roles, fields)
    argv = (kind, *paths, *(t for s in segments for t in s.tokens))
    return _Checked(PlanJob(name=name, kind=kind, argv=argv, line=header, inputs=tuple(used)), index, label,
                    roles, fields)


#: What stands in for an input a job names wrongly, so that its options are still checked.
_STAND_IN = "plan-input"


def _use_input(label, role, value, inputs, command, here, errors, segments, used, paths) -> bool:
    """Add input `value` in role `role` (a positional): its path and its layer options."""
    line = errors.line(here + (role,))
    if not isinstance(value, str):
        errors.add(line, f"{label}: {role} = {_show(value)}: expected the name of an input of [inputs], got "
                         f"{_type_name(value)}")
        return False
    if value not in inputs:
        errors.add(line, f"{label}: {role} = {_show(value)} names no input of [inputs]"
                         + (_suggest(value, inputs) or f" (inputs: {', '.join(inputs) or 'none'})"))
        return False
    if inputs[value] is None:  # its own errors are reported at the input
        return False
    paths.append(inputs[value]["path"])
    used.append(value)
    _input_options(value, ROLE_PREFIX[role], inputs[value], command, errors, segments, label, role)
    return True


def _input_options(name, prefix, table, command, errors, segments, label, role) -> None:
    for key in INPUT_KEYS[1:]:
        if key not in table:
            continue
        option = f"{prefix}{key}"
        line = errors.line(("inputs", name, key))
        if option not in command.options:
            if role == "density" and key == "id-field":
                continue  # a density's features are not rows: no id is needed
            errors.add(line, f"inputs.{name}: {key} cannot be used where {label} reads this input as its {role} "
                             f"({command.kind} has no --{option})")
            continue
        action = command.options[option]
        segments.append(_Segment(key, line, _tokens_for(key, table[key], action, f"--{option}"), f"input:{name}",
                                 table[key], f"--{option}"))


def _looks_like_file(text: str, folder: str) -> bool:
    from .density import _RASTER_EXT

    lower = text.lower().strip()
    vector = (".gpkg", ".shp", ".geojson", ".json", ".fgb", ".csv", ".kml", ".gml", ".zip", ".parquet")
    return (lower.endswith(_RASTER_EXT + vector) or _SCHEME.match(text) is not None or lower.startswith("/vsi")
            or os.path.exists(os.path.join(folder, text)))


def _use_density(label, value, job, inputs, command, folder, here, errors, segments, used) -> bool:
    """Add ``--density``: an input (blocks or a raster) with its options, or an expression."""
    line = errors.line(here + ("density",))
    action = command.options["density"]
    if not isinstance(value, str):
        errors.add(line, f"{label}: density = {_show(value)}: expected an input name or a density expression, "
                         f"got {_type_name(value)}")
        return False
    if value in inputs and job.get("density-kind") != "expression":
        table = inputs[value]
        if table is None:  # its own errors are reported at the input
            return False
        used.append(value)
        segments.append(_Segment("density", line, _tokens_for("density", table["path"], action, "--density"),
                                 "job", value, "--density"))
        _input_options(value, ROLE_PREFIX["density"], table, command, errors, segments, label, "density")
        return True
    if _looks_like_file(value, folder):
        errors.add(line, f"{label}: density = {_show(value)} names no input of [inputs]; a density file is named "
                         f"in [inputs] and the job gives its name{_suggest(value, inputs)}")
        return False
    close = _suggest(value, inputs) if _NAME.match(value) else ""
    from .expression import parse_expression

    try:
        parse_expression(value)
    except OptionError as err:
        errors.add(line, f"{label}: density = {_show(value)}: neither an input of [inputs] nor a valid density "
                         f"expression ({_plain(err.render().removeprefix('density: '), command)}){close}")
        return False
    segments.append(_Segment("density", line, _tokens_for("density", value, action, "--density"), "job", value,
                             "--density"))
    return True


def _option_segments(key, value, command, path: tuple, scope, label, errors) -> list[_Segment] | None:
    """The command-line words of one plan key, as segments: one per element of a list for a
    repeatable option (each with its element's line), else one; None when the value is wrong."""
    action = command.options[key]
    flag = f"--{key}"
    items = list(enumerate(value)) if isinstance(value, list) and isinstance(action, argparse._AppendAction) \
        else [(None, value)]
    out = []
    for index, item in items:
        line = errors.line(path if index is None else path + (index,))
        try:
            tokens = _tokens_for(key, item, action, flag)
        except ValueError as err:
            where = "settings" if scope == "settings" else label
            errors.add(line, f"{where}: {key} = {_show(value)}: {err}")
            return None
        out.append(_Segment(key, line, tokens, scope, value, flag))
    return out


def _plain(message: str, command: _Command) -> str:
    """A command's message with its flags written as plan keys (``--points`` -> ``points``)."""
    def key(match):
        word = match.group(0)[2:]
        return word if word in command.options else match.group(0)

    return re.sub(r"--[a-z][a-z0-9-]*", key, message)


def _flag_of(message: str, segments: list[_Segment]) -> _Segment | None:
    """The segment whose option a message names first."""
    by_flag = {s.flag: s for s in segments if s.flag}
    for found in re.finditer(r"--[a-z][a-z0-9-]*", message):
        if found.group(0) in by_flag:
            return by_flag[found.group(0)]
    return None


def _report(segment: _Segment | None, text: str, label: str, header: int, command: _Command, errors: _Errors) -> None:
    text = _plain(text, command)
    if segment is None:
        errors.add(header, f"{label}: {text}")
    elif segment.scope == "settings":
        errors.add(segment.line, f"settings: {segment.key} = {_show(segment.value)}: {text}")
    elif segment.scope.startswith("input:"):
        errors.add(segment.line, f"inputs.{segment.scope[6:]}: {segment.key} = {_show(segment.value)}: {text}")
    else:
        errors.add(segment.line, f"{label}: {segment.key} = {_show(segment.value)}: {text}")


def _parse(kind, paths, segments: list[_Segment], label, header: int, command: _Command, errors: _Errors, *,
           complete: bool) -> bool:
    """Parse the job's command line with its command's parser, dropping each option at fault and
    parsing again, so that every bad value is reported; then the checks each command makes
    before it reads a file.  True when nothing was wrong.  With `complete` false (the job
    already has errors, and stand-ins for its inputs), a complaint about a missing argument is
    not repeated."""
    _command_parsers()
    live = list(segments)
    clean = True
    while True:
        argv = [kind, *paths, *(t for s in live for t in s.tokens)]
        try:
            args = _PARSER.parse_args(argv)
            break
        except OptionError as err:
            clean = False
            message = str(err).removeprefix(f"{kind}: ")
            if not complete and message.startswith("the following arguments are required"):
                return False
            found = re.match(r"argument ([^:]+): (.*)$", message, re.DOTALL)
            segment = None
            if found:
                flag = found.group(1).split("/")[0]
                same = [s for s in live if s.flag == flag and s.tokens]
                # of a repeated option's values, the one the message quotes
                segment = next((s for s in same if repr(_word(s)) in found.group(2)), same[0] if same else None)
            if segment is None:  # not one option's fault: report it once, for the job
                _report(_flag_of(message, live), message, label, header, command, errors)
                return False
            _report(segment, found.group(2), label, header, command, errors)
            live.remove(segment)
    return _pre_checks(kind, args, live, label, header, command, errors) and clean


def _word(segment: _Segment) -> str:
    """The value word of a one-value segment (``--flag VALUE`` or ``--flag=VALUE``)."""
    last = segment.tokens[-1]
    return last.split("=", 1)[1] if last.startswith("--") and "=" in last else last


def _pre_checks(kind, args, segments, label, header, command, errors) -> bool:
    """The checks a command makes on its options before it reads a file (stop rule, sampler,
    radius), on the parsed `args`; each failure reported at the key that fed the option."""
    from .cli.common import describe, stop_rule
    from .samplers import check_sampler, draws_replicates
    from .units import parse_distance

    scale = {"coverage": {"scale": 1.0, "below": 1.0}, "integrate": {"scale": 1.0}}.get(kind, {})
    checks = [lambda: stop_rule(args, **scale)]
    if kind in ("overlap", "integrate"):
        checks.append(lambda: check_sampler(args.sampler, kind))
    if kind == "coverage" and getattr(args, "claim", None) is not None and draws_replicates(args.sampler):
        def replicates():
            raise OptionError("{param}: claim verdicts need a sampler of single points such as 'uniform'",
                              param="sampler")
        checks.append(replicates)
    if getattr(args, "radius", None) is not None:
        checks.append(lambda: parse_distance(args.radius))
    ok = True
    for check in checks:
        try:
            check()
        except OptionError as err:
            text = describe(err)
            segment = _flag_of(text, segments)
            if segment is not None:
                text = re.sub(rf"^{re.escape(segment.flag)}:\s*", "", text)
            _report(segment, text, label, header, command, errors)
            ok = False
    return ok


# ------------------------------------------------------------------------------ file checks


def _check_files(inputs: dict[str, dict], checked: list[_Checked], errors: _Errors) -> None:
    """Open each local vector input: readable, its layer there, the fields the plan names there."""
    from .density import _RASTER_EXT
    from .errors import LayerError
    from .load import is_network_path, list_layers

    fields_of: dict[str, set[str] | None] = {}
    for name, table in inputs.items():
        path = table["path"]
        if path.lower().endswith(_RASTER_EXT) or is_network_path(path):
            continue
        try:
            layers = list_layers(path, open_options=table.get("open-option"))
        except (LayerError, OptionError) as err:
            errors.add(errors.line(("inputs", name, "path")), f"inputs.{name}: {' '.join(str(err).split())}")
            continue
        layer = table.get("layer") or (layers[0] if layers else None)
        if layer not in layers:
            errors.add(errors.line(("inputs", name, "layer")), f"inputs.{name}: layer {layer!r} is not in "
                       f"{table['path']} (layers: {', '.join(layers)}){_suggest(layer, layers)}")
            continue
        fields = fields_of[name] = _fields(path, layer, table.get("open-option"))
        id_field = table.get("id-field")
        if fields is not None and id_field is not None and id_field not in fields:
            errors.add(errors.line(("inputs", name, "id-field")), f"inputs.{name}: id-field {id_field!r} is not "
                       f"an attribute of layer {layer!r} ({_listing(fields)}){_suggest(id_field, fields)}")
    for item in checked:
        for key, role in (("radius-field", "zones"), ("count-field", "density")):
            field = item.fields.get(key)
            name = item.roles.get(role)
            fields = fields_of.get(name)
            if field and fields is not None and field not in fields:
                errors.add(errors.line(("jobs", item.index, key)),
                           f"{item.label}: {key} {field!r} is not an attribute of input {name!r} "
                           f"({_listing(fields)}){_suggest(field, fields)}")


def _listing(fields) -> str:
    return "attributes: " + (", ".join(sorted(fields)) if fields else "none")


def _fields(path: str, layer: str | None, open_options) -> set[str] | None:
    """The attribute names of a vector layer, or None when fiona cannot say."""
    import fiona

    from .load import gdal_path, parse_open_options

    try:
        options = parse_open_options(open_options)
        with fiona.open(gdal_path(path), layer=layer, **options) as src:
            return set(src.schema.get("properties", {}))
    except Exception:  # noqa: BLE001 - the reader reports what is wrong when the job runs
        return None
