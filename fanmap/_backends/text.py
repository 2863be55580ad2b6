"""Delimited text in long format: one row per measured point.

Accepted: comma, tab, semicolon (with decimal commas) or whitespace separated
columns; a header line whose names may carry units in brackets or
parentheses (``B (T)``, ``Vg [mV]``, ``Rxx (kOhm)``) or after a slash
(``B / T``); the header may also be the last comment line before the data
(as ``numpy.savetxt`` writes it); comment lines start with ``#``, ``%`` or
``;``; blank lines separate sweeps; a repeated header line also starts a new
block.  The result is a raw dataset along dimension ``point`` with a
``BLOCK`` variable numbering the blank-line separated blocks.
"""

import io
import re
import warnings

import numpy as np
import xarray as xr

from ..errors import InputError

BLOCK = "_fanmap_block"
COMMENT_CHARS = ("#", "%", ";")

_UNIT_IN_BRACKETS = re.compile(r"^(?P<name>.*?)\s*[\(\[\{](?P<unit>[^\)\]\}]*)[\)\]\}]\s*$")
_UNIT_AFTER_SLASH = re.compile(r"^(?P<name>[^/]*?\S)\s+/\s+(?P<unit>\S.*)$")
_WS_HEADER_TOKEN = re.compile(r"[^\s\(\[\{]+(?:\s*[\(\[\{][^\)\]\}]*[\)\]\}])?")


def split_header_name(token):
    """``"Vg [mV]"`` -> ``("Vg", "mV")``; ``"B"`` -> ``("B", None)``."""
    token = token.strip().strip('"').strip("'").strip()
    match = _UNIT_IN_BRACKETS.match(token)
    if match and match.group("name"):
        return match.group("name").strip(), match.group("unit").strip() or None
    match = _UNIT_AFTER_SLASH.match(token)
    if match:
        return match.group("name").strip(), match.group("unit").strip()
    return token, None


def _delimiter(line):
    for delim in ("\t", ",", ";"):
        if delim in line:
            return delim
    return None  # whitespace


def _split(line, delim):
    if delim is None:
        return line.split()
    return [t.strip() for t in line.split(delim)]


def _header_tokens(line, delim, n_columns):
    if delim is not None:
        return _split(line, delim)
    tokens = _WS_HEADER_TOKEN.findall(line)
    if len(tokens) != n_columns:
        tokens = [t for t in re.split(r"\s{2,}", line.strip()) if t]
    return tokens


def _parse_numbers(tokens, decimal_comma):
    out = []
    for t in tokens:
        t = t.strip().strip('"')
        if decimal_comma:
            t = t.replace(",", ".")
        if t == "" or t.lower() in ("nan", "na", "n/a", "null", "none", "-"):
            out.append(np.nan)
        else:
            out.append(float(t))
    return out


def _is_numeric_line(tokens, decimal_comma):
    try:
        _parse_numbers(tokens, decimal_comma)
    except ValueError:
        return False
    return True


def read_text(path):
    """Read a long-format text file into a raw dataset along ``point``.

    Returns ``(dataset, notes)``; ``notes`` lists what was skipped.
    """
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except OSError as exc:
        raise InputError(f"{path}: cannot read the file ({exc.strerror or exc})") from None
    if b"\x00" in data[:4096]:
        raise InputError(f"{path}: this is a binary file, not delimited text; if it is netCDF, "
                         "HDF5 or npz, give it the matching suffix (.nc, .h5, .npz)")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        text = data.decode("latin-1")
    del data
    lines = text.splitlines()
    del text

    notes = []
    comments = []          # comment lines seen before the header/data
    header = None          # list of (name, unit)
    header_line_no = None
    delim = None
    decimal_comma = False
    rows, blocks, line_numbers = [], [], []
    block = 0
    pending_break = False
    bad_lines = []

    for number, raw in enumerate(lines, start=1):
        line = raw.strip()
        if not line:
            pending_break = bool(rows)
            continue
        if line.startswith(COMMENT_CHARS):
            if header is None and not rows:
                comments.append((number, line.lstrip("#%; \t")))
            continue
        if delim is None and header is None and not rows:
            delim = _delimiter(line)
            decimal_comma = delim == ";" and "," in line
        if delim == ";" and not rows and "," in line and not decimal_comma:
            decimal_comma = _is_numeric_line(_split(line, delim), True)
        if header is None:
            tokens = _split(line, delim)
            if _is_numeric_line(tokens, decimal_comma):
                header = _header_from_comments(comments, delim, len(tokens))
                header_line_no = 0
            else:
                header = [split_header_name(t) for t in _header_tokens(line, delim, len(tokens))]
                header_line_no = number
                continue
        if line[0] in _NUMERIC_START:
            # fast path: count the fields here, convert all lines at once below
            n_tokens = line.count(delim) + 1 if delim is not None else len(line.split())
            if n_tokens != len(header):
                bad_lines.append(number)
                continue
            if pending_break:
                block += 1
                pending_break = False
            rows.append(line)
            blocks.append(block)
            line_numbers.append(number)
            continue
        tokens = _split(line, delim)
        repeated = [split_header_name(t) for t in _header_tokens(line, delim, len(tokens))]
        if [n for n, _ in repeated] == [n for n, _ in header]:
            if [u for _, u in repeated] != [u for _, u in header]:
                raise InputError(
                    f"{path}: mixed units in one file: line {header_line_no or 1} has "
                    f"{_fmt_header(header)} but line {number} has {_fmt_header(repeated)}; "
                    "split the file at the second header or convert it to one set of units")
            pending_break = bool(rows)
            continue
        bad_lines.append(number)

    if rows:
        table, unreadable = _convert(rows, delim, decimal_comma, len(header))
        if unreadable:
            bad_lines = sorted(bad_lines + [line_numbers[i] for i in unreadable])
            keep = np.setdiff1d(np.arange(len(rows)), unreadable)
            table = table[keep]
            blocks = [blocks[i] for i in keep]
            line_numbers = [line_numbers[i] for i in keep]
            rows = [rows[i] for i in keep]
    if header is not None and not rows and bad_lines:
        raise InputError(f"{path}: no line after the header reads as {len(header)} numbers "
                         f"({_fmt_header(header)}); first bad line: {bad_lines[0]}")
    if header is None or not rows:
        raise InputError(f"{path}: no numeric data rows found; a long-format table needs a header "
                         "(e.g. 'B (T), Vg (V), Rxx (ohm)') and one row per measured point")
    if bad_lines:
        last_data = line_numbers[-1]
        trailing = [n for n in bad_lines if n > last_data]
        inner = [n for n in bad_lines if n <= last_data]
        if inner:
            shown = ", ".join(map(str, inner[:5])) + (" ..." if len(inner) > 5 else "")
            raise InputError(
                f"{path}: {len(inner)} line(s) cannot be read as {len(header)} numbers "
                f"({_fmt_header(header)}): line(s) {shown}; fix or comment them out with '#'")
        notes.append(f"ignored {len(trailing)} unreadable line(s) at the end of the file "
                     f"(line {trailing[0]}: an interrupted write?)")

    names = _unique_names([n for n, _ in header], path)
    ds = xr.Dataset()
    for i, (name, (_, unit)) in enumerate(zip(names, header)):
        attrs = {"units": unit} if unit else {}
        ds[name] = ("point", table[:, i], attrs)
    ds[BLOCK] = ("point", np.asarray(blocks, dtype=int))
    ds.attrs.update(_comment_attrs(comments))
    if delim == ";" and decimal_comma:
        notes.append("semicolon-separated with decimal commas")
    return ds, notes


_NUMERIC_START = frozenset("0123456789+-.nNiI")


def _convert(lines, delim, decimal_comma, n_columns):
    """All data lines to a float table at once; falls back to line by line to find bad ones.

    Returns ``(table, indices of unreadable lines)``.
    """
    text = "\n".join(lines)
    if decimal_comma:
        text = text.replace(",", ".")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            table = np.loadtxt(io.StringIO(text), delimiter=delim if delim else None, dtype=float,
                               ndmin=2, comments=None, quotechar='"')
        if table.shape == (len(lines), n_columns):
            return table, []
    except ValueError:
        pass
    table = np.full((len(lines), n_columns), np.nan)
    bad = []
    for i, line in enumerate(lines):
        try:
            table[i] = _parse_numbers(_split(line, delim), decimal_comma)
        except ValueError:
            bad.append(i)
    return table, bad


def _header_from_comments(comments, delim, n_columns):
    for _, line in reversed(comments):
        tokens = _header_tokens(line, delim, n_columns)
        if len(tokens) == n_columns and not _is_numeric_line(tokens, False):
            return [split_header_name(t) for t in tokens]
    return [(f"column{i + 1}", None) for i in range(n_columns)]


def _comment_attrs(comments):
    """``# excitation_current = 10 nA`` style comments become attributes."""
    attrs = {}
    for _, line in comments:
        match = re.match(r"^\s*([A-Za-z_][\w\s\-]*?)\s*[:=]\s*(.+?)\s*$", line)
        if match:
            attrs[match.group(1).strip().replace(" ", "_")] = match.group(2)
    return attrs


def _unique_names(names, path):
    seen = {}
    out = []
    for name in names:
        name = name or "column"
        if name in seen:
            seen[name] += 1
            name = f"{name}_{seen[name]}"
        else:
            seen[name] = 0
        out.append(name)
    if len(set(out)) != len(out):
        raise InputError(f"{path}: the header has repeated column names; rename them")
    return out


def _fmt_header(header):
    return ", ".join(f"{n} [{u}]" if u else n for n, u in header)
