"""The package's shape: no import cycles between modules, and the role tables in one place
(sigreport.model), so a new role or pair is one table entry plus its wording."""

from __future__ import annotations

import ast
from pathlib import Path

from sigreport.lexicon_tables import load_wording
from sigreport.model import ENHANCEMENT_PAIRS, ROLE_ORDER, SUPPRESSION_PAIRS, Role

PACKAGE = Path(__file__).resolve().parents[2] / "sigreport"
# Known and being cut elsewhere: the classic header reader imports the Enhanced MR reader inside
# a function, and the Enhanced reader imports the header reader's helpers at module level.
KNOWN_CYCLES = [{"sigreport.ingest.header", "sigreport.ingest.enhanced"}]


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _is_module(name: str) -> bool:
    path = PACKAGE.parent.joinpath(*name.split("."))
    return path.with_suffix(".py").is_file() or (path / "__init__.py").is_file()


def _is_type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _imports(path: Path) -> set[str]:
    """The sigreport modules ``path`` imports at run time (module level or inside functions;
    imports under ``if TYPE_CHECKING:`` are for types only and do not count)."""
    found: set[str] = set()

    def visit(node: ast.AST) -> None:
        if isinstance(node, ast.If) and _is_type_checking(node):
            for child in node.orelse:
                visit(child)
            return
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("sigreport"))
        elif (
            isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("sigreport")
        ):
            for alias in node.names:
                sub = f"{node.module}.{alias.name}"
                found.add(sub if _is_module(sub) else node.module)
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(ast.parse(path.read_text(encoding="utf-8")))
    return found


def _cycles(graph: dict[str, set[str]]) -> list[set[str]]:
    """Strongly connected components with more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    out: list[set[str]] = []

    def connect(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                connect(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = set()
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.add(w)
                if w == v:
                    break
            if len(component) > 1:
                out.append(component)

    for v in sorted(graph):
        if v not in index:
            connect(v)
    return out


def _graph() -> dict[str, set[str]]:
    return {_module_name(p): _imports(p) for p in sorted(PACKAGE.rglob("*.py"))}


def test_the_cycle_finder_finds_a_cycle():
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [{"a", "b", "c"}]


def test_region_shapes_and_masks_import_each_other_no_more():
    graph = _graph()
    assert "sigreport.rois.regions" not in graph["sigreport.rois.masks"]
    assert "sigreport.rois.space" in graph["sigreport.rois.masks"]
    assert not graph["sigreport.rois.space"] & {
        "sigreport.rois.regions",
        "sigreport.rois.masks",
    }


def test_no_import_cycles_but_the_known_one():
    assert [c for c in _cycles(_graph()) if c not in KNOWN_CYCLES] == []


def test_the_model_and_the_lexicon_files_import_no_stage():
    graph = _graph()
    assert graph["sigreport.model"] == set()
    assert graph["sigreport.lexicon"] <= {"sigreport.errors"}


def test_every_role_has_one_place_in_the_reading_order():
    assert sorted(ROLE_ORDER) == sorted(Role) and len(ROLE_ORDER) == len(set(ROLE_ORDER))
    assert ROLE_ORDER[-1] is Role.UNKNOWN


def test_pairs_are_of_measurable_roles():
    pairs = [*ENHANCEMENT_PAIRS, *(p for ps in SUPPRESSION_PAIRS.values() for p in ps)]
    assert all(Role.UNKNOWN not in pair and pair[0] is not pair[1] for pair in pairs)


def test_every_role_has_its_words():
    assert set(load_wording().roles) == {r.value for r in Role}


def test_no_module_keeps_its_own_list_of_roles():
    # A tuple, list or set literal naming two roles or more is a role table; the tables live in
    # sigreport.model. Role inference returns candidate roles, which is not a table.
    offenders = []
    for path in sorted(PACKAGE.rglob("*.py")):
        if path.name == "model.py" or path.relative_to(PACKAGE).as_posix() == "ingest/roles.py":
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Tuple | ast.List | ast.Set):
                roles = [
                    e
                    for e in node.elts
                    if isinstance(e, ast.Attribute)
                    and isinstance(e.value, ast.Name)
                    and e.value.id == "Role"
                ]
                if len(roles) >= 2:
                    offenders.append(f"{path.relative_to(PACKAGE)}:{node.lineno}")
    assert offenders == []
