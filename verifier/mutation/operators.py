"""Mutants of one source line, made on the syntax tree and written back as the line's exact text.

Each operator looks at one node of the tree (a comparison, an arithmetic operator, a condition, a
constant, a returned value, a statement) and proposes a faulty replacement node. The replacement is
spliced into the line's text at the node's position, and the result is checked on the tree: the
mutated file must parse to exactly the original tree with that one node replaced (otherwise the
text is retried in parentheses, else dropped), and must compile. So a mutant is a syntax-tree change
that a reader can apply with a plain text replacement of ``original`` by ``mutated``.

Lines where no fault is meaningful give no mutants: docstrings, ``pass``, ``...``, imports, logging
and warnings calls, ``raise NotImplementedError``, annotations without a value, ``assert`` statements,
code under ``if TYPE_CHECKING:``, decorators, signatures and annotations.
"""

from __future__ import annotations

import ast
from collections.abc import Iterator
from dataclasses import dataclass

from verifier.models import Mutant

# comparison operator -> its boundary and negated neighbours (common practice of mutation testing)
_COMPARE: dict[type[ast.cmpop], tuple[type[ast.cmpop], ...]] = {
    ast.Lt: (ast.LtE, ast.GtE),
    ast.LtE: (ast.Lt, ast.Gt),
    ast.Gt: (ast.GtE, ast.LtE),
    ast.GtE: (ast.Gt, ast.Lt),
    ast.Eq: (ast.NotEq,),
    ast.NotEq: (ast.Eq,),
    ast.In: (ast.NotIn,),
    ast.NotIn: (ast.In,),
    ast.Is: (ast.IsNot,),
    ast.IsNot: (ast.Is,),
}
_ARITHMETIC: dict[type[ast.operator], type[ast.operator]] = {
    ast.Add: ast.Sub,
    ast.Sub: ast.Add,
    ast.Mult: ast.Div,
    ast.Div: ast.Mult,
    ast.FloorDiv: ast.Mult,
    ast.Mod: ast.FloorDiv,
    ast.Pow: ast.Mult,
    ast.BitAnd: ast.BitOr,
    ast.BitOr: ast.BitAnd,
    ast.BitXor: ast.BitAnd,
    ast.LShift: ast.RShift,
    ast.RShift: ast.LShift,
}
_QUIET_CALLS = {"debug", "info", "warning", "warn", "error", "exception", "critical", "log", "print"}
_QUIET_OWNERS = {"logging", "logger", "log", "_log", "_logger", "LOG", "LOGGER", "warnings"}


@dataclass(frozen=True)
class Proposal:
    """One faulty replacement: ``node`` (in the file's tree) becomes ``replacement``."""

    operator: str
    node: ast.AST
    replacement: ast.AST


class FileMutator:
    """The mutants of any line of one Python file; the file is parsed once."""

    def __init__(self, source: str, path: str) -> None:
        self.source = source
        self.path = path
        self.rows = source.split("\n")  # a "\r" stays at its line's end: texts stay exact
        self.tree = ast.parse(source, filename=path)
        self.parents: dict[ast.AST, tuple[ast.AST, str, int | None]] = {}
        for parent in ast.walk(self.tree):
            for name, value in ast.iter_fields(parent):
                if isinstance(value, ast.AST):
                    self.parents[value] = (parent, name, None)
                elif isinstance(value, list):
                    for index, item in enumerate(value):
                        if isinstance(item, ast.AST):
                            self.parents[item] = (parent, name, index)
        self.original_dump = ast.dump(self.tree)
        self._by_line: dict[int, list[Proposal]] | None = None

    def proposals(self, line: int) -> list[Proposal]:
        """Every faulty replacement whose node starts on ``line``, in source order."""
        if self._by_line is None:
            self._by_line = {}
            for proposal in self._all_proposals():
                self._by_line.setdefault(getattr(proposal.node, "lineno", 0), []).append(proposal)
        return list(self._by_line.get(line, ()))

    def render(self, proposal: Proposal) -> Mutant | None:
        """The proposal as a mutant of the file's text, or None when no text gives exactly that tree."""
        node = proposal.node
        start, end = node.lineno, node.end_lineno or node.lineno  # type: ignore[attr-defined]
        text = _KeepingUnparser(self, proposal.replacement).visit(proposal.replacement)
        expected = self._dump_with(proposal)
        for candidate in (text, f"({text})"):
            mutated_rows = self._splice(node, candidate)
            mutated_source = "\n".join([*self.rows[: start - 1], *mutated_rows, *self.rows[end:]])
            if self._parses_to(mutated_source, expected):
                statement = self.statement_of(node)
                return Mutant(
                    path=self.path,
                    line=start,
                    end_line=end,
                    operator=proposal.operator,
                    original="\n".join(self.rows[start - 1 : end]),
                    mutated="\n".join(mutated_rows),
                    scope=self.scope_of(node),
                    lines=tuple(range(statement.lineno, _header_end(statement) + 1)),
                )
        return None

    def statement_of(self, node: ast.AST) -> ast.stmt:
        while not isinstance(node, ast.stmt):
            node = self.parents[node][0]
        return node

    def scope_of(self, node: ast.AST) -> str | None:
        """The qualified name of the outermost function around ``node`` that a module attribute reaches
        (through classes only); None for code that runs when the module is imported."""
        chain: list[ast.AST] = []
        current = node
        while current in self.parents:
            current = self.parents[current][0]
            chain.append(current)
        names: list[str] = []
        for holder in reversed(chain):  # from the module inwards
            if isinstance(holder, ast.ClassDef):
                names.append(holder.name)
            elif isinstance(holder, (ast.FunctionDef, ast.AsyncFunctionDef)):
                names.append(holder.name)
                return ".".join(names)
            elif not isinstance(holder, ast.Module):
                return None  # a class inside an if or a loop: not reachable as an attribute path
        return None

    # -- the operators ---------------------------------------------------------------------------------------------

    def _all_proposals(self) -> Iterator[Proposal]:
        for node in ast.walk(self.tree):
            if not hasattr(node, "lineno") or not self._meaningful(node):
                continue
            yield from _proposals_for(node, self)

    def _meaningful(self, node: ast.AST) -> bool:
        """False for nodes whose fault the tests cannot be expected to notice (see the module docstring)."""
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef, ast.Module)):
            return False
        current = node
        while current in self.parents:
            parent, field_name, _index = self.parents[current]
            if isinstance(parent, ast.JoinedStr) or field_name in ("annotation", "returns", "decorator_list"):
                return False
            if isinstance(parent, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda)) and field_name == "args":
                return False
            if isinstance(parent, ast.ClassDef) and field_name in ("bases", "keywords"):
                return False
            if isinstance(parent, ast.If) and _is_type_checking(parent.test):
                return False
            if isinstance(parent, ast.Raise) and isinstance(node, ast.Constant):
                return False  # the message of an exception: its wording is not the result
            current = parent
        statement = self.statement_of(node)
        return not _quiet_statement(statement)

    def segment(self, node: ast.AST) -> str | None:
        """The source text of ``node`` when it lies on one line, else None."""
        if getattr(node, "lineno", None) is None or node.lineno != node.end_lineno:  # type: ignore[attr-defined]
            return None
        row = self.rows[node.lineno - 1].encode("utf-8")  # type: ignore[attr-defined]
        return row[node.col_offset : node.end_col_offset].decode("utf-8")  # type: ignore[attr-defined]

    # -- text --------------------------------------------------------------------------------------------------------

    def _splice(self, node: ast.AST, text: str) -> list[str]:
        """The rows ``node`` spans with its text replaced by ``text`` (column offsets are UTF-8 bytes)."""
        start, end = node.lineno, node.end_lineno or node.lineno  # type: ignore[attr-defined]
        first = self.rows[start - 1].encode("utf-8")
        last = self.rows[end - 1].encode("utf-8")
        head = first[: node.col_offset].decode("utf-8")  # type: ignore[attr-defined]
        tail = last[node.end_col_offset :].decode("utf-8")  # type: ignore[attr-defined]
        return (head + text + tail).split("\n")

    def _dump_with(self, proposal: Proposal) -> str:
        """The dump of the file's tree with the proposal applied (in place, then restored)."""
        parent, name, index = self.parents[proposal.node]
        if index is None:
            setattr(parent, name, proposal.replacement)
        else:
            getattr(parent, name)[index] = proposal.replacement
        try:
            return ast.dump(self.tree)
        finally:
            if index is None:
                setattr(parent, name, proposal.node)
            else:
                getattr(parent, name)[index] = proposal.node

    def _parses_to(self, source: str, expected: str) -> bool:
        try:
            tree = ast.parse(source, filename=self.path)
            compile(tree, self.path, "exec")
        except (SyntaxError, ValueError):
            return False
        return ast.dump(tree) == expected and expected != self.original_dump


# Nodes that never need parentheses around them: their own text can be reused as it is in the file.
_ATOMS = (ast.Name, ast.Constant, ast.Attribute, ast.Call, ast.Subscript, ast.List, ast.Dict, ast.Set)


class _KeepingUnparser(ast._Unparser):  # type: ignore[name-defined]
    """``ast.unparse`` that writes the parts of the replacement taken from the file (names, literals,
    calls) with their text as it is in the file, so a mutant changes only what its fault changes
    (quotes, spacing and number spelling stay). The result is checked on the tree by the caller."""

    def __init__(self, mutator: FileMutator, root: ast.AST) -> None:
        super().__init__()
        self._mutator = mutator
        self._root = root

    def traverse(self, node: ast.AST | list[ast.AST]) -> None:
        reusable = not isinstance(node, list) and node is not self._root and isinstance(node, _ATOMS)
        if reusable and node in self._mutator.parents and (text := self._mutator.segment(node)) is not None:
            self.write(text)
            return
        super().traverse(node)


def _header_end(statement: ast.stmt) -> int:
    """The last line of a statement's own text: a compound statement's header, not its body."""
    body = getattr(statement, "body", None)
    if isinstance(body, list) and body and isinstance(statement, (ast.If, ast.While, ast.For, ast.With, ast.Try)):
        return max(statement.lineno, body[0].lineno - 1)
    return statement.end_lineno or statement.lineno


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _quiet_statement(statement: ast.stmt) -> bool:
    """Statements whose fault is not a wrong result: see the module docstring."""
    if isinstance(statement, (ast.Pass, ast.Import, ast.ImportFrom, ast.Global, ast.Nonlocal, ast.Assert)):
        return True
    if isinstance(statement, ast.AnnAssign) and statement.value is None:
        return True
    if isinstance(statement, ast.Expr):
        value = statement.value
        if isinstance(value, ast.Constant):  # a docstring, a bare string or ``...``
            return True
        if isinstance(value, ast.Call) and _is_quiet_call(value):
            return True
    if isinstance(statement, ast.Raise) and statement.exc is not None:
        raised = statement.exc.func if isinstance(statement.exc, ast.Call) else statement.exc
        if isinstance(raised, ast.Name) and raised.id == "NotImplementedError":
            return True
    return False


def _is_quiet_call(call: ast.Call) -> bool:
    function = call.func
    if isinstance(function, ast.Name):
        return function.id == "print"
    if isinstance(function, ast.Attribute) and function.attr in _QUIET_CALLS:
        owner = function.value
        while isinstance(owner, ast.Attribute):
            owner = owner.value
        owner_name = owner.id if isinstance(owner, ast.Name) else ""
        if isinstance(function.value, ast.Attribute):
            owner_name = function.value.attr
        return owner_name in _QUIET_OWNERS or owner_name.endswith(("logger", "log"))
    return False


def _proposals_for(node: ast.AST, mutator: FileMutator) -> Iterator[Proposal]:
    """The faulty replacements of one node (the operators listed in the issue, in a fixed order)."""
    if isinstance(node, ast.Compare):
        for index, op in enumerate(node.ops):
            for other in _COMPARE.get(type(op), ()):
                ops = [*node.ops]
                ops[index] = other()
                yield Proposal("compare", node, ast.Compare(left=node.left, ops=ops, comparators=node.comparators))
    elif isinstance(node, ast.BinOp) and type(node.op) in _ARITHMETIC:
        yield Proposal("arithmetic", node, ast.BinOp(left=node.left, op=_ARITHMETIC[type(node.op)](), right=node.right))
    elif isinstance(node, ast.BoolOp):
        flipped: ast.boolop = ast.Or() if isinstance(node.op, ast.And) else ast.And()
        yield Proposal("and-or", node, ast.BoolOp(op=flipped, values=node.values))
    elif isinstance(node, ast.UnaryOp) and isinstance(node.op, (ast.Not, ast.USub, ast.Invert)):
        yield Proposal("unary", node, node.operand)
    elif isinstance(node, ast.Constant):
        yield from _constant(node, mutator)
    elif isinstance(node, ast.stmt):
        yield from _statement(node)
    if isinstance(node, (ast.expr,)) and _is_condition(node, mutator):
        yield Proposal("negate", node, ast.UnaryOp(op=ast.Not(), operand=node))


def _is_condition(node: ast.AST, mutator: FileMutator) -> bool:
    if node not in mutator.parents:
        return False
    parent, field_name, _index = mutator.parents[node]
    if field_name != "test" or not isinstance(parent, (ast.If, ast.While, ast.IfExp)):
        return False
    return not (isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.Not))  # ``not`` is the unary operator


def _constant(node: ast.Constant, mutator: FileMutator) -> Iterator[Proposal]:
    value = node.value
    parent = mutator.parents.get(node, (None, "", None))[0]
    if isinstance(parent, ast.UnaryOp) and isinstance(parent.op, ast.USub):
        return  # ``-1``: the unary operator and the number are mutated as one by the other operators
    if isinstance(value, bool):
        yield Proposal("constant", node, ast.Constant(value=not value))
    elif isinstance(value, (int, float)) and not isinstance(value, complex):
        for other in (0, value + 1) if value != 0 else (1,):  # a negative number would be a unary minus
            if other != value:
                yield Proposal("constant", node, ast.Constant(value=type(value)(other)))
    elif isinstance(value, str):
        yield Proposal("constant", node, ast.Constant(value="" if value else "mutated"))
    elif isinstance(value, bytes):
        yield Proposal("constant", node, ast.Constant(value=b"" if value else b"mutated"))


_EMPTY = {
    ast.List: "[]",
    ast.ListComp: "[]",
    ast.Tuple: "()",
    ast.Dict: "{}",
    ast.DictComp: "{}",
    ast.Set: "set()",
    ast.SetComp: "set()",
    ast.JoinedStr: "''",
}


def _statement(node: ast.stmt) -> Iterator[Proposal]:
    if isinstance(node, ast.Return) and node.value is not None:
        if not (isinstance(node.value, ast.Constant) and node.value.value is None):
            yield Proposal("return", node, ast.Return(value=ast.Constant(value=None)))
        empty = _EMPTY.get(type(node.value))
        if empty is not None:
            yield Proposal("return", node, ast.Return(value=ast.parse(empty, mode="eval").body))
    elif isinstance(node, ast.Expr) and isinstance(node.value, (ast.Call, ast.Await)):
        yield Proposal("remove-call", node, ast.Pass())
    elif isinstance(node, ast.AugAssign):
        yield Proposal("remove-update", node, ast.Pass())
        if type(node.op) in _ARITHMETIC:
            yield Proposal(
                "arithmetic", node, ast.AugAssign(target=node.target, op=_ARITHMETIC[type(node.op)](), value=node.value)
            )
    elif isinstance(node, ast.Raise):
        yield Proposal("skip-raise", node, ast.Pass())
    elif isinstance(node, ast.Break):
        yield Proposal("loop-jump", node, ast.Continue())
    elif isinstance(node, ast.Continue):
        yield Proposal("loop-jump", node, ast.Break())
