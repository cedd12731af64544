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
import re
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
        found = [node for node in walk(self.tree) if isinstance(node, ast.Call)]
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


# Fields that hold no node, or only nodes no rule looks for (contexts, operators): walk skips them.
_LEAF_FIELDS = frozenset(
    {"ctx", "id", "attr", "arg", "name", "module", "level", "kind", "type_comment", "op", "ops", "is_async"}
    | {"conversion", "tag"}
)


@functools.cache
def _node_fields(node_type: type) -> tuple[str, ...]:
    if issubclass(node_type, ast.Constant):
        return ()  # its value is data, never a node
    return tuple(name for name in node_type._fields if name not in _LEAF_FIELDS)  # type: ignore[attr-defined]


def walk(tree: ast.AST) -> Iterator[ast.AST]:
    """Every node under ``tree`` but contexts and operators (like ``ast.walk``, in a cheaper loop; the order
    does not matter here)."""
    stack = [tree]
    node_type = ast.AST
    fields_of = _node_fields
    while stack:
        node = stack.pop()
        yield node
        for name in fields_of(type(node)):  # type: ignore[arg-type]  # an AST class is hashable
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
    # a call or subscript counts when it resolves (``run = vars(os)["system"]``, ``m = importlib.import_module("os")``)
    kinds = (ast.Name, ast.Attribute, ast.Call, ast.Subscript)
    references = [(name, value) for name, value in assignments if isinstance(value, kinds)]
    names.local.update(name for name, value in assignments if not isinstance(value, kinds))
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
    if isinstance(node, ast.Call):
        return _resolve_call(node, names)
    if isinstance(node, ast.Subscript):
        key = constant_string(node.slice)
        namespace = namespace_of(node.value, names)
        if key is not None and namespace is not None:
            return tuple(_member(base, key) for base in namespace)
    return ()


def _member(namespace: str, key: str) -> str:
    """``os`` + ``system`` -> ``os.system``; the namespace of ``sys.modules`` (``""``) holds modules."""
    return f"{namespace}.{key}" if namespace else key


def _resolve_call(node: ast.Call, names: Names) -> tuple[str, ...]:
    """``getattr(o, "a" + "b")``, ``vars(m).get("k")``, ``sys.modules.get("os")``, ``importlib.import_module("os")``,
    ``__import__("os")``: the dotted names they stand for when every name in them is fixed in the source."""
    called = [canonical(n) for n in resolve(node.func, names)] if isinstance(node.func, ast.Name) else []
    if "getattr" in called and len(node.args) >= 2 and (attr := constant_string(node.args[1])) is not None:
        return tuple(f"{base}.{attr}" for base in (resolve(node.args[0], names) or (UNKNOWN,)))
    if isinstance(node.func, ast.Attribute) and node.func.attr == "get" and node.args:
        key = constant_string(node.args[0])
        namespace = namespace_of(node.func.value, names)
        if key is not None and namespace is not None:
            return tuple(_member(base, key) for base in namespace)
    meanings = called or [canonical(n) for n in resolve(node.func, names)]
    if any(m in ("importlib.import_module", "__import__") for m in meanings) and node.args:
        module = constant_string(node.args[0])
        if module is not None:
            return (module if "importlib.import_module" in meanings else module.split(".", 1)[0],)
    return ()


def namespace_of(node: ast.expr, names: Names) -> tuple[str, ...] | None:
    """The modules whose attributes ``node`` maps by name: ``vars(os)``, ``os.__dict__``, ``builtins.__dict__``,
    ``__builtins__`` (a dict in imported modules, Python docs, "builtins"), and ``sys.modules`` (whose names
    are modules, given as ``""``); None for anything else."""
    if (
        isinstance(node, ast.Call)
        and isinstance(node.func, ast.Name)
        and len(node.args) == 1
        and "vars" in _resolve_root(node.func.id, names)
    ):
        return resolve(node.args[0], names) or None
    if isinstance(node, ast.Attribute) and node.attr == "__dict__":
        return resolve(node.value, names) or None
    meanings = resolve(node, names)
    if "sys.modules" in meanings:
        return ("",)
    if "builtins" in meanings:
        return ("builtins",)
    return None


# Source text where string pieces are joined, by the parser ('sys' 'tem', over lines too) or at run time
# ("ev" + "al", "".join(...)): the rules' quick looks at a source let such a source through, since a name,
# a shell or a secret may be spelt in pieces there.
PIECES = re.compile(r"""['"](?:[ \t]|\\?\n)+[rbuRBUfF]{0,2}['"]|['"]\s*\+\s*[rbuRBUfF]{0,2}['"]|['"]\.join\(""")


def constant_string(node: ast.AST) -> str | None:
    """The text of a string fixed in the source: a literal (adjacent pieces are one literal already), pieces
    joined by ``+``, an f-string without fields, ``"".join`` of such pieces; None for anything else."""
    if isinstance(node, ast.Constant):
        return node.value if isinstance(node.value, str) else None
    if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Add):
        left, right = constant_string(node.left), constant_string(node.right)
        return left + right if left is not None and right is not None else None
    if isinstance(node, ast.JoinedStr):
        parts = [constant_string(v) for v in node.values]
        return "".join(p for p in parts if p is not None) if all(p is not None for p in parts) else None
    if (
        isinstance(node, ast.Call)
        and isinstance(node.func, ast.Attribute)
        and node.func.attr == "join"
        and len(node.args) == 1
        and not node.keywords
        and isinstance(node.args[0], (ast.List, ast.Tuple))
    ):
        separator = constant_string(node.func.value)
        pieces = [constant_string(item) for item in node.args[0].elts]
        if separator is not None and all(p is not None for p in pieces):
            return separator.join(p for p in pieces if p is not None)
    return None


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


_OS_TWINS = ("posix.", "nt.")  # the platform modules os re-exports (Python docs, os: "posix" / "nt")


def canonical(dotted: str) -> str:
    """``builtins.eval`` is ``eval``; ``posix.system`` (what ``os.system`` is on POSIX) is ``os.system``."""
    if dotted.startswith(_OS_TWINS):
        return "os." + dotted.split(".", 1)[1]
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
