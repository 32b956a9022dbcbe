"""Templates in the experiment file: ``{factor}`` and ``{factor.name}``.

A template is a string with placeholders naming a factor (replaced by the
level's label) or a named value of the level (``{build.bin}``). ``{{`` and
``}}`` stand for literal braces. Substitution is purely textual and never
re-splits: a level value always becomes part of exactly one argument.

When a command runs through a shell (``shell: true``) a value must arrive as
exactly itself wherever its placeholder stands: bare, inside ``"..."``, inside
``'...'`` (or inside ``$( )``, backquotes, ``${ }`` or a here-document).
`render_shell` reads the shell text around each placeholder to know which of
these it is in (`shell_contexts`). A value made only of characters no shell
treats specially (letters, digits, ``_@%+:,./-``) is written in place. Any
other value is passed out of band: it is assigned, quoted, to a shell variable
on a line of its own before the command, and the placeholder becomes a
reference to that variable written for its context (``"${__bhv1}"`` bare,
``${__bhv1}`` inside double quotes, ``'"${__bhv1}"'`` inside single quotes).
The shell never reads the value as code: the result of an expansion is not
parsed again, so even a misjudged context can only change how the value is
split, never run it. Inside arithmetic ``$(( ))`` only whole numbers are
accepted (an arithmetic expression may run commands in some shells), and a
placeholder inside a here-document whose delimiter is quoted is refused (it
could never be expanded there).
"""

from __future__ import annotations

import re
import shlex
from functools import lru_cache
from dataclasses import dataclass
from typing import Callable, Mapping

_PLACEHOLDER = re.compile(r"\{\{|\}\}|\{([^{}]*)\}")
#: Values written in place in a shell command: nothing in them is special to a shell.
_PLAIN = re.compile(r"[A-Za-z0-9_@%+:,./-]+")
_INTEGER = re.compile(r"[+-]?[0-9]+")
#: Prefix of the shell variables that carry values out of band.
SHELL_VAR = "__bhv"

# Shell contexts a placeholder can stand in (see `shell_contexts`).
BARE, DOUBLE, SINGLE, COMMENT, ARITH, PARAM, HEREDOC, HEREDOC_QUOTED = (
    "bare", "double quotes", "single quotes", "comment", "arithmetic", "parameter expansion",
    "here-document", "quoted here-document")


@dataclass(frozen=True)
class Placeholder:
    factor: str
    name: str | None  # the named value, or None for the label itself
    text: str


def placeholders(template: str) -> list[Placeholder]:
    """The placeholders of a template, in order. Malformed braces raise ValueError."""
    out = []
    pos = 0
    for m in _PLACEHOLDER.finditer(template):
        between = template[pos:m.start()]
        if "{" in between or "}" in between:
            raise ValueError(f"unmatched brace in {template!r}; write {{{{ or }}}} for a "
                             "literal brace")
        pos = m.end()
        if m.group(0) in ("{{", "}}"):
            continue
        inner = m.group(1)
        if not inner.strip():
            raise ValueError(f"empty placeholder {{}} in {template!r}; write {{factor}}")
        factor, _, name = inner.partition(".")
        out.append(Placeholder(factor=factor, name=name or None, text=m.group(0)))
    rest = template[pos:]
    if "{" in rest or "}" in rest:
        raise ValueError(f"unmatched brace in {template!r}; write {{{{ or }}}} for a literal "
                         "brace")
    return out


def render(template: str, lookup: Callable[[str, str | None], str],
           quote: bool = False) -> str:
    """Replace placeholders with ``lookup(factor, name)``.

    ``quote``: quote each value as one bare shell word (`shlex.quote`). A
    command for ``/bin/sh -c`` is rendered with `render_shell` instead, which
    also handles placeholders inside quotes.
    """

    out = []
    for piece in _compiled(template):
        if piece.__class__ is str:
            out.append(piece)
        else:
            value = lookup(*piece)
            out.append(shlex.quote(value) if quote else value)
    return "".join(out)


@lru_cache(maxsize=4096)
def _compiled(template: str) -> tuple:
    """A template split once into literal text and ``(factor, name)`` placeholders
    (a plan renders the same few templates for every one of its cells)."""
    out: list = []
    pos = 0
    for m in _PLACEHOLDER.finditer(template):
        if m.start() > pos:
            out.append(template[pos:m.start()])
        pos = m.end()
        if m.group(0) in ("{{", "}}"):
            out.append(m.group(0)[0])
            continue
        factor, _, name = m.group(1).partition(".")
        out.append((factor, name or None))
    if pos < len(template):
        out.append(template[pos:])
    return tuple(out)


class _ShellReader:
    """Follows the quoting state of POSIX shell text, one piece at a time.

    A stack of frames: ``U`` unquoted (the top level, ``$( )`` and backquotes),
    ``S`` single quotes, ``D`` double quotes, ``C`` a comment, ``A`` arithmetic,
    ``P`` a ``${ }`` expansion, ``H`` a here-document body. Enough of the shell
    grammar (XCU 2.2, 2.3, 2.6, 2.7.4 of POSIX.1-2017) to place a placeholder;
    what it misjudges can only change how a value is split (see the module).
    """

    def __init__(self):
        self.stack = [["U", None, 0]]   # [kind, opener, depth]
        self.escape = False
        self.word_start = True
        self.pending = []               # here-documents opened on this line: (delim, quoted, strip)
        self.line = ""                  # current line inside a here-document
        self.text = ""                  # all text read (for lookahead of ``<<``)

    def context(self) -> str:
        kind = self.stack[-1][0]
        if kind == "H":
            return HEREDOC_QUOTED if self.stack[-1][1][1] else HEREDOC
        return {"U": BARE, "D": DOUBLE, "S": SINGLE, "C": COMMENT, "A": ARITH,
                "P": PARAM}[kind]

    def feed(self, s: str) -> None:
        i = 0
        n = len(s)
        while i < n:
            i = self._step(s, i)

    def _step(self, s: str, i: int) -> int:
        """Read the character at ``i`` in the current frame; the index of the next one."""
        ch = s[i]
        nxt = s[i + 1] if i + 1 < len(s) else ""
        top = self.stack[-1]
        kind = top[0]
        if kind == "H":
            return self._in_heredoc(top, ch, i)
        if self.escape:
            self.escape = False
            self.word_start = False
            return i + 1
        if kind == "S":
            if ch == "'":
                self.stack.pop()
            return i + 1
        if kind == "C":
            if ch == "\n":
                self.stack.pop()
                return self._newline(i)
            return i + 1
        if ch == "\\":
            self.escape = True
            return i + 1
        if kind == "D":
            return self._in_double(s, i, ch, nxt)
        if kind == "A":
            return self._in_arith(top, i, ch, nxt)
        if kind == "P":
            return self._in_param(s, i, ch, nxt)
        return self._unquoted(s, i, ch, nxt, top)

    def _in_heredoc(self, top, ch: str, i: int) -> int:
        """A here-document body: collect the line; its delimiter line closes it."""
        if ch == "\n":
            delim, _quoted, strip = top[1]
            line = self.line.lstrip("\t") if strip else self.line
            self.line = ""
            if line == delim:
                self.stack.pop()
                self._heredoc_next()
        else:
            self.line += ch
        return i + 1

    def _in_double(self, s: str, i: int, ch: str, nxt: str) -> int:
        """Inside double quotes: the closing quote, or an expansion opening."""
        if ch == '"':
            self.stack.pop()
            self.word_start = False
            return i + 1
        return self._dollar_or_backquote(s, i, ch, nxt)

    def _in_arith(self, top, i: int, ch: str, nxt: str) -> int:
        """Inside ``$(( ))``: count parentheses until the closing ``))``."""
        if ch == "(":
            top[2] += 1
        elif ch == ")":
            top[2] -= 1
            if top[2] <= 0:
                self.stack.pop()
                return i + (2 if nxt == ")" else 1)
        return i + 1

    def _in_param(self, s: str, i: int, ch: str, nxt: str) -> int:
        """Inside ``${ }``: the closing brace, quotes, or an expansion opening."""
        if ch == "}":
            self.stack.pop()
            return i + 1
        if ch in "'\"":
            self.stack.append(["S" if ch == "'" else "D", None, 0])
            return i + 1
        return self._dollar_or_backquote(s, i, ch, nxt)

    def _unquoted(self, s: str, i: int, ch: str, nxt: str, top) -> int:
        """Unquoted text (the top level, ``$( )`` or backquotes): quotes, comments,
        newlines, here-documents, the end of a command substitution, expansions."""
        if ch == "'":
            self.stack.append(["S", None, 0])
            self.word_start = False
            return i + 1
        if ch == '"':
            self.stack.append(["D", None, 0])
            self.word_start = False
            return i + 1
        if ch == "#" and self.word_start:
            self.stack.append(["C", None, 0])
            return i + 1
        if ch == "\n":
            return self._newline(i)
        if ch == "<" and nxt == "<":
            return self._heredoc(s, i)
        if ch == "(" and top[1] == "$(":
            top[2] += 1
        elif ch == ")" and top[1] == "$(":
            if top[2] > 0:
                top[2] -= 1
            else:
                self.stack.pop()
                self.word_start = False
                return i + 1
        elif ch == "`" and top[1] == "`":
            self.stack.pop()
            self.word_start = False
            return i + 1
        j = self._dollar_or_backquote(s, i, ch, nxt)
        self.word_start = ch in " \t;&|()<>"
        return j

    def _dollar_or_backquote(self, s: str, i: int, ch: str, nxt: str) -> int:
        if ch == "`":
            self.stack.append(["U", "`", 0])
            self.word_start = True
            return i + 1
        if ch == "$" and nxt == "(":
            if s[i + 2:i + 3] == "(":
                self.stack.append(["A", "$((", 2])
                return i + 3
            self.stack.append(["U", "$(", 0])
            self.word_start = True
            return i + 2
        if ch == "$" and nxt == "{":
            self.stack.append(["P", "${", 0])
            return i + 2
        return i + 1

    def _newline(self, i: int) -> int:
        self.word_start = True
        if self.pending:
            self._heredoc_next()
        return i + 1

    def _heredoc_next(self) -> None:
        if self.pending:
            self.stack.append(["H", self.pending.pop(0), 0])

    def _heredoc(self, s: str, i: int) -> int:
        """``<<WORD`` or ``<<-WORD``: note the here-document that starts on the next line."""
        j = i + 2
        strip = s[j:j + 1] == "-"
        if strip:
            j += 1
        while j < len(s) and s[j] in " \t":
            j += 1
        word = ""
        quoted = False
        while j < len(s) and s[j] not in " \t\n;&|()<>":
            c = s[j]
            if c in "'\"":
                quoted = True
                end = s.find(c, j + 1)
                end = len(s) if end < 0 else end
                word += s[j + 1:end]
                j = end + 1
                continue
            if c == "\\":
                quoted = True
                word += s[j + 1:j + 2]
                j += 2
                continue
            word += c
            j += 1
        if word:
            self.pending.append((word, quoted, strip))
        self.word_start = False
        return j


def _pieces(template: str):
    """The template as ("text", literal) and ("ph", factor, name, placeholder text) pieces."""
    pos = 0
    for m in _PLACEHOLDER.finditer(template):
        if m.start() > pos:
            yield ("text", template[pos:m.start()])
        pos = m.end()
        tok = m.group(0)
        if tok in ("{{", "}}"):
            yield ("text", tok[0])
        else:
            factor, _, name = m.group(1).partition(".")
            yield ("ph", factor, name or None, tok)
    if pos < len(template):
        yield ("text", template[pos:])


def shell_contexts(template: str) -> list[tuple[Placeholder, str]]:
    """Each placeholder of a shell command template with the context it stands in
    (`BARE`, `DOUBLE`, `SINGLE`, `COMMENT`, `ARITH`, `PARAM`, `HEREDOC`,
    `HEREDOC_QUOTED`)."""
    reader = _ShellReader()
    out = []
    for piece in _pieces(template):
        if piece[0] == "text":
            reader.feed(piece[1])
        else:
            out.append((Placeholder(piece[1], piece[2], piece[3]), reader.context()))
            reader.word_start = False  # the value is part of a word
    return out


def check_shell_value(ph_text: str, context: str, value: str) -> str | None:
    """Why ``value`` cannot stand in a placeholder in ``context``, or None."""
    if context == ARITH and not _INTEGER.fullmatch(value):
        return (f"placeholder {ph_text} stands inside $(( )), where only whole numbers are "
                f"safe, and the value {value!r} is not one; give whole-number levels or move "
                "the placeholder out of the arithmetic")
    if context == HEREDOC_QUOTED:
        return (f"placeholder {ph_text} stands inside a here-document with a quoted delimiter, "
                "where the shell never expands anything; unquote the delimiter (<<EOF)")
    return None


def render_shell(template: str, lookup: Callable[[str, str | None], str]) -> str:
    """The command text for ``/bin/sh -c``: every value arrives as exactly itself.

    Plain values are written in place; any other value is assigned to a shell
    variable on a first line of its own and referenced in the form its
    placeholder's context needs (see the module docstring). Raises ValueError
    for a value its context cannot hold safely (`check_shell_value`).
    """
    reader = _ShellReader()
    out: list[str] = []
    names: dict[str, str] = {}
    for piece in _pieces(template):
        if piece[0] == "text":
            reader.feed(piece[1])
            out.append(piece[1])
            continue
        _, factor, name, text = piece
        value = lookup(factor, name)
        ctx = reader.context()
        reader.word_start = False  # the value is part of a word
        why = check_shell_value(text, ctx, value)
        if why:
            raise ValueError(why)
        if ctx == ARITH or _PLAIN.fullmatch(value):
            out.append(value)
            continue
        var = names.get(value)
        if var is None:
            var = names[value] = f"{SHELL_VAR}{len(names) + 1}"
        if ctx in (DOUBLE, HEREDOC, PARAM):
            out.append("${%s}" % var)
        elif ctx == SINGLE:
            out.append("'\"${%s}\"'" % var)
        else:  # bare (and a comment, where it does nothing)
            out.append('"${%s}"' % var)
    body = "".join(out)
    if not names:
        return body
    assign = " ".join(f"{var}={shlex.quote(value)}" for value, var in names.items())
    return f"{assign}\n{body}"


def level_lookup(levels: Mapping[str, str], values: Mapping[str, Mapping[str, str]]):
    """A lookup over a cell: ``levels`` factor → label, ``values`` factor → named values."""

    def lookup(factor: str, name: str | None) -> str:
        if name is None:
            return levels[factor]
        return values[factor][name]

    return lookup
