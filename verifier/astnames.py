"""What a name in a Python module refers to: imports, aliases and attribute chains resolved to dotted names.

``import os as o`` makes ``o.system`` mean ``os.system``; ``from os import system as run`` makes ``run``
mean ``os.system``; ``sh = subprocess.Popen`` makes ``sh`` mean ``subprocess.Popen``; ``from os import *``
makes an otherwise unbound ``system`` possibly mean ``os.system``. The analysis is flow-insensitive (a
name bound twice keeps both meanings), which errs on the side of finding more, never fewer, meanings.
Also here: a parse cache shared by the static rules, and the notion of a literal expression.
"""

from __future__ import annotations

import ast
import builtins
import functools
import gc
import symtable
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field

UNKNOWN = "?"  # stands for a part of a chain that is not a name (a call's result, a subscript, ...)
LOCAL = "<local>"  # the prefix of names this module binds itself (def, class, assignment)
_BUILTIN_NAMES = frozenset(dir(builtins))


_CACHE_SIZE = 2048


@functools.lru_cache(maxsize=_CACHE_SIZE)
def parse_or_error(source: str, filename: str = "<unknown>") -> ast.Module | SyntaxError | ValueError:
    """The module's AST, or the error that stopped the parse; cached so that every static rule shares one
    parse per file (the trees are shared: do not mutate them)."""
    return _parse_or_error(source, filename)


def _parse_or_error(source: str, filename: str) -> ast.Module | SyntaxError | ValueError:
    paused = gc.isenabled()
    gc.disable()  # the cached trees are many objects and no cycles: a collection here would only rescan them
    try:
        return ast.parse(source, filename=filename)
    except (SyntaxError, ValueError) as error:
        return error
    finally:
        if paused:
            gc.enable()


def syntax_error(source: str, filename: str = "<unknown>") -> SyntaxError | ValueError | None:
    """The error that stops ``ast.parse`` of ``source``, or None when it parses.

    The symbol table module runs Python's own parser without building the tree as Python objects,
    which is most of a parse's cost when no rule needs the tree. It also rejects some code the parser
    accepts (a repeated argument name, ``nonlocal`` at module level), so when it fails, the real parse
    (shared with the other rules) decides."""
    try:
        symtable.symtable(source, filename, "exec")
    except Exception:  # whatever the check raised, the parse below gives the answer
        result = parse_or_error(source, filename)
        return None if isinstance(result, ast.Module) else result
    return None


def parse(source: str, filename: str = "<unknown>") -> ast.Module | None:
    """The module's AST, or None when it does not parse (``code.syntax`` reports that)."""
    result = parse_or_error(source, filename)
    return result if isinstance(result, ast.Module) else None


class ModuleIndex:
    """A module's tree, its names and assignments (from its statements alone), and, read on first use
    (only ``calls.banned`` needs them, and only for a file that may hold a banned call), its calls in
    source order."""

    def __init__(self, tree: ast.Module) -> None:
        self.tree = tree
        self.assignments: list[ast.Assign | ast.AnnAssign] = []
        self.names = _collect_names(_statements(tree), self.assignments)
        self.assignments.sort(key=lambda node: (node.lineno, node.col_offset))

    @functools.cached_property
    def calls(self) -> list[ast.Call]:
        found = [node for node in _walk(self.tree) if isinstance(node, ast.Call)]
        found.sort(key=lambda node: (node.lineno, node.col_offset))  # stable: ties keep the walk's order
        return found


_indexes: dict[tuple[str, str], ModuleIndex | None] = {}


def module_index(source: str, filename: str = "<unknown>", keep: bool = True) -> ModuleIndex | None:
    """The module's :class:`ModuleIndex` (None when it does not parse), cached for the other rules.

    ``keep=False`` for a module no other rule is likely to read: an index kept already is used, else
    one is built and not kept (many kept trees cost every later garbage collection a scan of them)."""
    key = (filename, source)
    if key in _indexes:
        return _indexes[key]
    parsed = parse_or_error(source, filename) if keep else _parse_or_error(source, filename)
    index = ModuleIndex(parsed) if isinstance(parsed, ast.Module) else None
    if keep:
        if len(_indexes) >= _CACHE_SIZE:
            del _indexes[next(iter(_indexes))]  # the oldest
        _indexes[key] = index
    return index


def clear_caches() -> None:
    """Forget every kept parse and index (the benchmarks start each run from nothing)."""
    parse_or_error.cache_clear()
    _indexes.clear()


def _walk(tree: ast.AST) -> Iterator[ast.AST]:
    """Every node under ``tree`` (like ``ast.walk``, in a cheaper loop; the order does not matter here)."""
    stack = [tree]
    node_type = ast.AST
    while stack:
        node = stack.pop()
        yield node
        for name in node._fields:
            value = getattr(node, name, None)
            if isinstance(value, node_type):
                stack.append(value)
            elif isinstance(value, list):
                stack.extend(item for item in value if isinstance(item, node_type))


_BLOCK_ITEMS = (ast.stmt, ast.excepthandler, ast.match_case)


def _statements(tree: ast.AST) -> Iterator[ast.AST]:
    """The statements under ``tree`` (with the ``except`` and ``case`` clauses that hold some), in the
    order :func:`_walk` meets them. Imports, definitions and assignments are statements, and no
    expression holds a statement (a lambda's body is an expression), so skipping the expressions loses
    none of them; it is most of the tree."""
    stack = [tree]
    block_items = _BLOCK_ITEMS
    while stack:
        node = stack.pop()
        yield node
        for name in node._fields:
            value = getattr(node, name, None)
            # a list field holds one kind of node: statements, clauses, or something else entirely
            if isinstance(value, list) and value and isinstance(value[0], block_items):
                stack.extend(value)


@dataclass
class Names:
    """The bindings of one module that give names a dotted meaning."""

    aliases: dict[str, set[str]] = field(default_factory=dict)  # local name -> dotted names it may stand for
    star_modules: list[str] = field(default_factory=list)  # modules imported with ``from m import *``
    local: set[str] = field(default_factory=set)  # names bound by def, class or a plain assignment

    def bind(self, name: str, dotted: str) -> None:
        self.aliases.setdefault(name, set()).add(dotted)


def module_names(tree: ast.Module) -> Names:
    """Collect every import and simple alias assignment of the module, at any depth."""
    return _collect_names(_statements(tree), [])


def _collect_names(nodes: Iterable[ast.AST], assigns: list[ast.Assign | ast.AnnAssign]) -> Names:
    names = Names()
    assignments: list[tuple[str, ast.expr]] = []
    for node in nodes:
        if isinstance(node, ast.AnnAssign) and node.value is not None:
            assigns.append(node)
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.asname:
                    names.bind(alias.asname, alias.name)
                else:  # ``import os.path`` binds ``os``
                    head = alias.name.split(".", 1)[0]
                    names.bind(head, head)
        elif isinstance(node, ast.ImportFrom) and node.module and not node.level:
            for alias in node.names:
                if alias.name == "*":
                    names.star_modules.append(node.module)
                else:
                    names.bind(alias.asname or alias.name, f"{node.module}.{alias.name}")
        elif isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
            names.local.add(node.name)
        elif isinstance(node, ast.Assign):
            assigns.append(node)
            for target in node.targets:
                if isinstance(target, ast.Name):
                    assignments.append((target.id, node.value))
    _resolve_assignments(names, assignments)
    return names


def _resolve_assignments(names: Names, assignments: list[tuple[str, ast.expr]]) -> None:
    """``run = os.system`` aliases ``run``; any other assignment makes the name a local (not a builtin)."""
    references = [(name, value) for name, value in assignments if isinstance(value, (ast.Name, ast.Attribute))]
    names.local.update(name for name, value in assignments if not isinstance(value, (ast.Name, ast.Attribute)))
    for _ in range(3):  # a few rounds settle chains like ``a = os; b = a.system``
        for name, value in references:
            meanings = [m for m in resolve(value, names) if not m.startswith((UNKNOWN, LOCAL))]
            for meaning in meanings:
                if meaning != name:
                    names.bind(name, meaning)
            if not meanings:
                names.local.add(name)


def resolve(node: ast.expr, names: Names) -> tuple[str, ...]:
    """The dotted names ``node`` may stand for: ``o.path.join`` -> ``("os.path.join",)``.

    A chain whose root is an unknown local keeps its text (``session.get``); a chain rooted in a call
    or subscript starts with ``?`` (``?.load``). An empty tuple means the expression is no name at all.
    """
    if isinstance(node, ast.Name):
        return _resolve_root(node.id, names)
    if isinstance(node, ast.Attribute):
        return tuple(f"{base}.{node.attr}" for base in (resolve(node.value, names) or (UNKNOWN,)))
    if isinstance(node, ast.Call) and _is_literal_getattr(node, names):
        obj, attr = node.args[0], node.args[1]
        assert isinstance(attr, ast.Constant)
        return tuple(f"{base}.{attr.value}" for base in (resolve(obj, names) or (UNKNOWN,)))
    return ()


def _resolve_root(name: str, names: Names) -> tuple[str, ...]:
    if name in names.aliases:
        return tuple(sorted(names.aliases[name]))
    if name in ("builtins", "__builtins__"):
        return ("builtins",)
    if name in names.local:  # defined in this module: not a builtin, whatever its name
        return (f"{LOCAL}.{name}",)
    found = [f"{module}.{name}" for module in names.star_modules]
    if name in _BUILTIN_NAMES or not found:
        found.append(name)
    return tuple(found)


def _is_literal_getattr(node: ast.Call, names: Names) -> bool:
    """``getattr(obj, "attr")``: the same as ``obj.attr`` for our purposes."""
    return (
        isinstance(node.func, ast.Name)
        and "getattr" in _resolve_root(node.func.id, names)
        and len(node.args) >= 2
        and isinstance(node.args[1], ast.Constant)
        and isinstance(node.args[1].value, str)
    )


def canonical(dotted: str) -> str:
    """``builtins.eval`` is ``eval``."""
    return dotted.removeprefix("builtins.")


def is_literal(node: ast.expr) -> bool:
    """True for an expression whose value is fixed in the source: constants, containers and arithmetic of
    constants, f-strings without replacement fields. Names, calls and formatted strings are not."""
    if isinstance(node, ast.Constant):
        return True
    if isinstance(node, (ast.Tuple, ast.List, ast.Set)):
        return all(is_literal(item) for item in node.elts)
    if isinstance(node, ast.Dict):
        return all(k is not None and is_literal(k) for k in node.keys) and all(is_literal(v) for v in node.values)
    if isinstance(node, ast.JoinedStr):
        return all(isinstance(value, ast.Constant) for value in node.values)
    if isinstance(node, ast.BinOp):
        return is_literal(node.left) and is_literal(node.right)
    if isinstance(node, ast.UnaryOp):
        return is_literal(node.operand)
    return False


def span(node: ast.AST) -> range:
    """The 1-based source lines ``node`` covers."""
    start = getattr(node, "lineno", 0)
    return range(start, (getattr(node, "end_lineno", None) or start) + 1)


def touches(node: ast.AST, lines: Iterable[int] | frozenset[int]) -> bool:
    """True when any line of ``node`` is in ``lines``."""
    wanted = lines if isinstance(lines, (set, frozenset)) else frozenset(lines)
    return any(n in wanted for n in span(node))
