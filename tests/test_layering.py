"""The package's layers, as a table, checked against every import in `tui/`.

Each folder of `tui/` is one room; the loose modules at the top (`errors`, `token_style`
and the package itself) are the floor every room may stand on. `MAY_IMPORT` says which
rooms a room may import; an import elsewhere, an import cycle between modules, a room
listed here that no longer exists, or a core module that pulls in Textual or Rich at
run time fails a test. Imports inside `if TYPE_CHECKING:` are not imports at run time
and are left out; imports inside functions count. (Common practice, no source: a
layered package with no cycles, enforced by a test, as import-linter contracts do.)
"""

from __future__ import annotations

import ast
import json
import subprocess
import sys
from collections import defaultdict
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "tui"

FLOOR = {"tui", "tui.errors", "tui.files", "tui.numbers", "tui.progress", "tui.settings",
         "tui.token_style"}
MAY_IMPORT: dict[str, set[str]] = {
    "decoding": set(),
    "model": set(),
    "session": {"decoding", "model"},
    "transcripts": {"decoding", "model", "session"},
    "reports": {"session", "transcripts"},
    "sweeps": {"decoding", "model", "session"},
    "workbench": {"decoding", "model", "session", "transcripts"},
    "app": {"decoding", "session", "transcripts", "workbench"},
    "bench": {"decoding", "model", "session", "sweeps"},
    "commands": {"decoding", "model", "session", "transcripts", "reports", "sweeps",
                 "workbench", "app"},
    "tui.cli": {"commands"},
    "tui.__main__": {"tui.cli"},
}
# Rooms whose modules must run without Textual or Rich (the display libraries of the app).
CORE = ("decoding", "model", "session", "transcripts", "reports", "sweeps", "workbench")
# Where the display and plotting libraries may be imported at all.
DISPLAY_LIBRARIES = {"textual": {"app"}, "rich": {"app", "sweeps.report"},
                     "matplotlib": {"reports.gather", "sweeps.report"},
                     "plotext": {"sweeps.report"}}
MAX_LOOSE = 8
# Ray: imported by the cluster module only, which only the sweep command's --ray branch
# and the benchmark's cluster row reach (so no other command ever loads Ray).
CLUSTER_LIBRARY = "ray"
CLUSTER_MODULE = "tui.sweeps.cluster"
CLUSTER_USERS = {"tui.commands.sweep", "tui.bench.sweep"}


def module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def room_of(module: str) -> str:
    parts = module.split(".")
    if len(parts) >= 2 and (PACKAGE / parts[1]).is_dir():
        return parts[1]
    return module


def imports_of(path: Path) -> list[str]:
    """Every module `path` imports at run time (absolute names), TYPE_CHECKING blocks left out."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    hidden: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            hidden.update(id(n) for n in ast.walk(node))
    found = []
    for node in ast.walk(tree):
        if id(node) in hidden:
            continue
        if isinstance(node, ast.Import):
            found += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found.append(node.module)
            found += [f"{node.module}.{a.name}" for a in node.names]  # `from tui.x import mod`
    return found


def module_graph() -> dict[str, set[str]]:
    modules = {module_name(p): p for p in PACKAGE.rglob("*.py")}
    graph: dict[str, set[str]] = defaultdict(set)
    for name, path in modules.items():
        for target in imports_of(path):
            if target in modules and target != name:
                graph[name].add(target)
    return {name: graph[name] for name in modules}


def cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components of more than one module (Tarjan's algorithm)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return found


def test_every_room_in_the_table_exists_and_every_room_is_in_the_table():
    rooms = {p.name for p in PACKAGE.iterdir() if (p / "__init__.py").is_file()}
    listed = {r for r in MAY_IMPORT if not r.startswith("tui.")}
    assert listed == rooms
    for loose in [*FLOOR - {"tui"}, "tui.cli", "tui.__main__"]:
        assert (PACKAGE / f"{loose.split('.')[1]}.py").is_file(), loose


def test_at_most_eight_modules_stay_loose_at_the_top():
    loose = sorted(p.name for p in PACKAGE.glob("*.py") if p.name != "__init__.py")
    assert len(loose) <= MAX_LOOSE, loose


def test_every_import_follows_the_table():
    bad = []
    for module, targets in module_graph().items():
        room = room_of(module)
        allowed = MAY_IMPORT.get(room, set()) | FLOOR | {room}  # the floor: itself only
        for target in targets:
            if room_of(target) not in allowed and target not in allowed:
                bad.append(f"{module} -> {target}")
    assert bad == []


def test_no_import_cycles_between_modules():
    assert cycles(module_graph()) == []


def test_the_cycle_check_finds_a_cycle():
    # the check itself, on a made-up graph: a -> b -> c -> a, and d alone
    assert cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": set()}) == [["a", "b", "c"]]


def test_display_libraries_only_where_the_table_allows():
    bad = []
    for path in PACKAGE.rglob("*.py"):
        module = module_name(path)
        inside = module.removeprefix("tui.")
        for target in imports_of(path):
            top = target.split(".")[0]
            if top in DISPLAY_LIBRARIES and not any(
                    inside == place or inside.startswith(place + ".")
                    for place in DISPLAY_LIBRARIES[top] | {"commands"}):
                bad.append(f"{module} imports {top}")
    assert bad == []


def test_core_modules_import_no_textual_or_rich():
    core = sorted(module_name(p) for room in CORE for p in (PACKAGE / room).rglob("*.py"))
    assert len(core) > 40  # every core module, found from the folders, not a hand list
    code = (
        "import importlib, json, sys\n"
        f"for m in {core!r}: importlib.import_module(m)\n"
        "print(json.dumps(sorted(k for k in sys.modules if k.split('.')[0] in ('textual', 'rich'))))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert json.loads(out.stdout) == []


def test_the_recipe_command_does_not_load_torch():
    code = ("import sys\nfrom tui.cli import main\n"
            "rc = main(['recipe', 'check', 'top_p=0.9'])\n"
            "print('torch' in sys.modules, rc)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip().splitlines()[-1] == "False 0"


def test_ray_only_in_the_cluster_module_which_only_its_users_reach():
    ray_importers, cluster_importers = set(), set()
    for path in PACKAGE.rglob("*.py"):
        for target in imports_of(path):
            if target.split(".")[0] == CLUSTER_LIBRARY:
                ray_importers.add(module_name(path))
            if target == CLUSTER_MODULE or target.startswith(CLUSTER_MODULE + "."):
                cluster_importers.add(module_name(path))
    assert ray_importers == {CLUSTER_MODULE}
    assert cluster_importers == CLUSTER_USERS
