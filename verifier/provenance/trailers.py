"""Commit-message trailers, read the way ``git interpret-trailers --parse`` reads them, and the machine mark.

The parser mirrors git 2.39's rules with the default configuration (separator ``:`` only, comment
character ``#``, no configured trailers). It works on ``str`` but treats only ASCII as letters, digits and
white space, as git does on bytes. The structure follows git's trailer.c and commit.c as remembered
from reading them; every rule below was checked against ``git interpret-trailers --parse`` on git 2.39.5
(tests/test_trailers.py compares the two on each message).

Stdlib only and nothing heavy: this module is on the commit hook's fast path.
"""

from __future__ import annotations

import functools
import re
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # the commit hook's fast path must not pay for importing the data model
    from verifier.models import MachineMark

MACHINE_KEY = "Model-Written"
SCOPE_KEY = "Model-Written-Scope"
UNKNOWN_AGENT = "unknown"

_SPACE = " \t\n\r"  # git's isspace(): no \v or \f (checked: "Key: a\f" keeps the \f)
_COMMENT = "#"
_SEPARATORS = ":"
_TOKEN_CHARS = frozenset("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789-")
_GIT_GENERATED_PREFIXES = ("Signed-off-by: ", "(cherry picked from commit ")
_SCISSORS = "# ------------------------ >8 ------------------------\n"
_CONFLICTS = "Conflicts:\n"
_CONTINUATION_BREAK = re.compile("\n[ \t\n\r]*")


def parse_trailers(message: str) -> list[tuple[str, str]]:
    """Return the (key, value) pairs ``git interpret-trailers --parse`` prints for ``message``, in order."""
    text = message.split("\0", 1)[0]  # git reads the message as a C string
    end = _trailer_end(text, _patch_start(text))
    start = _trailer_start(text, end)
    return _parse_block(text[start:end])


def machine_mark(message: str) -> MachineMark | None:
    """Read the ``Model-Written`` mark of a commit message; None when the commit carries none."""
    trailers = parse_trailers(message)
    agents = [value for key, value in trailers if key.lower() == MACHINE_KEY.lower()]
    if not agents:
        return None
    globs = (glob for key, value in trailers if key.lower() == SCOPE_KEY.lower() for glob in value.split())
    from verifier.models import MachineMark

    return MachineMark(agent=agents[-1] or UNKNOWN_AGENT, scope=tuple(dict.fromkeys(globs)))


def path_in_scope(path: str, scope: tuple[str, ...]) -> bool:
    """Whether a repository-relative ``path`` is covered by ``scope``; an empty scope covers every path."""
    return not scope or any(_glob_matches(pattern, path.lstrip("/")) for pattern in scope)


# --- where the trailer block is ---------------------------------------------------------------------


def _next_line(text: str, pos: int) -> int:
    newline = text.find("\n", pos)
    return len(text) if newline == -1 else newline + 1


def _last_line(text: str, length: int) -> int:
    """Start of the last line of ``text[:length]`` (a final newline belongs to that line); -1 if empty."""
    if length == 0:
        return -1
    return text.rfind("\n", 0, length - 1) + 1


def _is_blank_line(text: str, pos: int) -> bool:
    while pos < len(text) and text[pos] != "\n" and text[pos] in _SPACE:
        pos += 1
    return pos == len(text) or text[pos] == "\n"


def _patch_start(text: str) -> int:
    """Where a patch part begins: the first line that is ``---`` followed by white space."""
    pos = 0
    while pos < len(text):
        if text.startswith("---", pos) and pos + 3 < len(text) and text[pos + 3] in _SPACE:
            return pos
        pos = _next_line(text, pos)
    return len(text)


def _scissors_cutoff(text: str, length: int) -> int:
    if text.startswith(_SCISSORS):
        return 0
    found = text.find("\n" + _SCISSORS)
    # git 2.39 searches the whole message and loops forever when the scissors line follows the '---'
    # divider (observed: interpret-trailers spun for minutes); we look only before the divider.
    return found + 1 if 0 <= found < length else length


def _trailer_end(text: str, length: int) -> int:
    """End of the message proper: drop the trailing run of comments, empty lines and old Conflicts blocks."""
    cutoff = _scissors_cutoff(text, length)
    run_start = 0  # 0 also means "no run", as in git: a run starting at the very top is found one line late
    in_conflicts = False
    bol = 0
    while bol < cutoff:
        newline = text.find("\n", bol, cutoff)
        next_bol = cutoff if newline == -1 else newline + 1
        if text[bol] in (_COMMENT, "\n"):
            run_start = run_start or bol
        elif text.startswith(_CONFLICTS, bol):
            in_conflicts = True
            run_start = run_start or bol
        elif in_conflicts and text[bol] == "\t":
            pass  # a path listed in the Conflicts block
        elif run_start:
            run_start, in_conflicts = 0, False
        bol = next_bol
    return run_start or cutoff


def _find_separator(line: str) -> int:
    """Offset of the separator after a token (letters, digits, '-', then optional blanks); -1 if none."""
    blank_seen = False
    for offset, char in enumerate(line):
        if char in _SEPARATORS:
            return offset
        if not blank_seen and char in _TOKEN_CHARS:
            continue
        if offset and char in " \t":
            blank_seen = True
            continue
        break
    return -1


def _title_end(text: str, length: int) -> int:
    """End of the first paragraph, which is never a trailer block (git skips comment lines here, but a
    comment line is never blank, so it cannot end the paragraph anyway)."""
    pos = 0
    while pos < length:
        if _is_blank_line(text, pos):
            break
        pos = _next_line(text, pos)
    return pos


def _trailer_start(text: str, length: int) -> int:
    """Start of the trailer block in ``text[:length]``, or ``length`` when the last paragraph is not one."""
    end_of_title = _title_end(text, length)
    only_blanks_so_far = True
    recognized_prefix = False
    trailer_lines = non_trailer_lines = possible_continuations = 0
    bol = _last_line(text, length)
    while bol >= end_of_title:
        line = text[bol : _next_line(text, bol)]
        if line.startswith(_COMMENT):
            non_trailer_lines += possible_continuations
            possible_continuations = 0
        elif _is_blank_line(text, bol):
            if not only_blanks_so_far:
                non_trailer_lines += possible_continuations
                if recognized_prefix and trailer_lines * 3 >= non_trailer_lines:
                    return _next_line(text, bol)
                if trailer_lines and not non_trailer_lines:
                    return _next_line(text, bol)
                return length
        else:
            only_blanks_so_far = False
            if line.startswith(_GIT_GENERATED_PREFIXES):
                recognized_prefix = True
                trailer_lines += 1
                possible_continuations = 0
            elif _find_separator(line) >= 1:
                trailer_lines += 1
                possible_continuations = 0
            elif line[0] in _SPACE:
                possible_continuations += 1
            else:
                non_trailer_lines += 1 + possible_continuations
                possible_continuations = 0
        bol = _last_line(text, bol)
    return length


# --- what the trailer block holds ---------------------------------------------------------------------


def _parse_block(block: str) -> list[tuple[str, str]]:
    entries: list[str] = []
    continues_trailer = False
    for line in _split_lines(block):
        if continues_trailer and line[0] in _SPACE:
            entries[-1] += line
            continue
        entries.append(line)
        continues_trailer = _find_separator(line) >= 1
    pairs = []
    for entry in entries:
        separator = _find_separator(entry)
        if entry.startswith(_COMMENT) or separator < 1:
            continue  # comment or prose: part of the block, but not a trailer
        key = entry[:separator].strip(_SPACE)
        pairs.append((key, _unfold(entry[separator + 1 :].strip(_SPACE))))
    return pairs


def _split_lines(text: str) -> list[str]:
    """Split on '\\n' only, keeping it (str.splitlines also splits on \\r, \\f, \\x1c and more)."""
    lines = [line + "\n" for line in text.split("\n")]
    lines[-1] = lines[-1][:-1]
    return lines if lines[-1] else lines[:-1]


def _unfold(value: str) -> str:
    """Join continuation lines: each newline and the white space after it become one space."""
    return _CONTINUATION_BREAK.sub(" ", value).strip(_SPACE) if "\n" in value else value


# --- scope globs --------------------------------------------------------------------------------------


def _glob_matches(pattern: str, path: str) -> bool:
    """Match a root-relative glob: ``*`` and ``?`` stay within a folder, ``**`` crosses folders.

    Like git's ``:(glob)`` pathspec, a pattern without wildcards also covers everything under it. Our
    addition: a trailing ``/`` makes the pattern name folders, covering everything inside them.
    """
    whole_folder = pattern.endswith("/")
    regex, has_wildcards = _compile(pattern)
    if regex is None:
        return True
    if not whole_folder and regex.fullmatch(path):
        return True
    if has_wildcards and not whole_folder:
        return False
    return any(regex.fullmatch(path[:i]) for i, char in enumerate(path) if char == "/")


@functools.lru_cache(maxsize=256)
def _compile(pattern: str) -> tuple[re.Pattern[str] | None, bool]:
    """Compile a glob to a regex (None: the pattern names the whole repository) and say if it has wildcards."""
    body = re.sub("/+", "/", pattern).strip("/")
    while body.startswith("./"):
        body = body[2:]
    if body in ("", ".", "**"):
        return None, True
    segments = body.split("/")
    parts: list[str] = []
    has_wildcards = False
    for index, segment in enumerate(segments):
        last = index == len(segments) - 1
        if segment == "**":
            parts.append(".*" if last else "(?:.*/)?")
            has_wildcards = True
            continue
        translated, wild = _translate_segment(segment)
        has_wildcards = has_wildcards or wild
        parts.append(translated if last else translated + "/")
    return re.compile("".join(parts), re.DOTALL), has_wildcards


def _translate_segment(segment: str) -> tuple[str, bool]:
    """Translate one folder-level piece of a glob; other runs of ``*`` (as in ``a**b``) act as one ``*``."""
    out: list[str] = []
    wild = False
    i = 0
    while i < len(segment):
        char = segment[i]
        if char == "*":
            while i + 1 < len(segment) and segment[i + 1] == "*":
                i += 1
            out.append("[^/]*")
            wild = True
        elif char == "?":
            out.append("[^/]")
            wild = True
        elif char == "[" and (close := _class_end(segment, i)) != -1:
            out.append(_translate_class(segment[i + 1 : close]))
            wild = True
            i = close
        elif char == "\\" and i + 1 < len(segment):
            i += 1
            out.append(re.escape(segment[i]))
        else:
            out.append(re.escape(char))
        i += 1
    return "".join(out), wild


def _class_end(segment: str, start: int) -> int:
    """Index of the ``]`` closing the bracket class opened at ``start``; -1 when it is not closed."""
    i = start + 1
    if i < len(segment) and segment[i] in "!^":
        i += 1
    if i < len(segment) and segment[i] == "]":
        i += 1  # a ']' right after the opening is a literal member
    return segment.find("]", i)


def _translate_class(members: str) -> str:
    negated = members[:1] in ("!", "^")
    if negated:
        members = members[1:]
    pieces: list[str] = []
    i = 0
    while i < len(members):
        if i + 2 < len(members) and members[i + 1] == "-":
            low, high = members[i], members[i + 2]
            if low <= high:  # a reversed range matches nothing
                pieces.append(f"{re.escape(low)}-{re.escape(high)}")
            i += 3
        else:
            pieces.append(re.escape(members[i]))
            i += 1
    if negated:
        return "[^/" + "".join(pieces) + "]"
    return "[" + "".join(pieces) + "]" if pieces else "(?!)"
