"""The package's layout, read from its imports with ast: data flows one way through stages.

STYLE.md section 1: a stage imports only from earlier stages and from errors.py; the tools
built on the stages (synth, verify, batch, ...) are imported by no stage; only plot.py and
cli.py (and the campaign report) import matplotlib or click at module level, click only
cli.py; ``import okdecode`` loads neither scipy, matplotlib nor click.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "okdecode"
# the stages in the order data flows through them
# (sequence, the soft-decision decoder, redecides the symbols with the code's patterns from
# text.py, so it comes after text; the receiver runs it when asked)
STAGES = ("capture", "baseband", "marks", "symbols", "text", "sequence", "report", "receiver")
TOOLS = ("synth", "verify", "batch", "plot", "cli", "campaign", "detect")
# module-level matplotlib is allowed here only (issue 2, STYLE.md section 1)
MATPLOTLIB_OK = {"okdecode.plot", "okdecode.cli", "okdecode.campaign", "okdecode.batch"}
CLICK_OK = {"okdecode.cli"}


def module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


MODULES = {module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def is_package(name: str) -> bool:
    return MODULES.get(name, Path()).name == "__init__.py"


def resolve(name: str, node: ast.ImportFrom) -> list[str]:
    """Absolute names a ``from ... import ...`` statement of module ``name`` loads."""
    if node.level == 0:
        base = node.module or ""
    else:
        package = name.split(".") if is_package(name) else name.split(".")[:-1]
        package = package[: len(package) - (node.level - 1)]
        base = ".".join(package + ([node.module] if node.module else []))
    out = []
    for alias in node.names:
        # "from . import baseband" names the submodule; "from . import __version__" the package
        sub = f"{base}.{alias.name}"
        out.append(sub if sub in MODULES else base)
    return out


def imports(name: str, *, top_level_only: bool = False) -> set[str]:
    """Every module an okdecode module imports (anywhere, or at module level only).

    ``if TYPE_CHECKING:`` blocks are left out of the module-level set: they never run.
    """
    tree = ast.parse(MODULES[name].read_text(encoding="utf-8"))
    if top_level_only:
        nodes: list[ast.AST] = []
        todo = list(tree.body)
        while todo:
            node = todo.pop()
            if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
                continue
            if isinstance(node, (ast.If, ast.Try, ast.With)):
                todo += [*node.body, *getattr(node, "orelse", []),
                         *getattr(node, "finalbody", [])]
                for handler in getattr(node, "handlers", []):
                    todo += handler.body
            nodes.append(node)
    else:
        nodes = list(ast.walk(tree))
    out: set[str] = set()
    for node in nodes:
        if isinstance(node, ast.Import):
            out |= {alias.name for alias in node.names}
        elif isinstance(node, ast.ImportFrom):
            out |= set(resolve(name, node))
    return out


def stage_of(name: str) -> str | None:
    parts = name.split(".")
    return parts[1] if len(parts) > 1 and parts[1] in STAGES else None


def test_the_modules_are_found():
    assert {f"okdecode.{s}" for s in STAGES} <= set(MODULES)
    assert "okdecode.errors" in MODULES


@pytest.mark.parametrize("name", sorted(n for n in MODULES if stage_of(n)))
def test_a_stage_imports_only_earlier_stages(name):
    rank = STAGES.index(stage_of(name))
    for imported in imports(name):
        if not imported.startswith("okdecode"):
            continue
        if imported in ("okdecode", "okdecode.errors"):  # the package's names, its errors
            continue
        other = stage_of(imported)
        assert other is not None, f"{name} imports {imported}, which is no stage"
        assert STAGES.index(other) <= rank, f"{name} imports the later stage {imported}"


@pytest.mark.parametrize("name", sorted(n for n in MODULES if stage_of(n)))
def test_no_stage_imports_the_tools(name):
    tools = {f"okdecode.{t}" for t in TOOLS}
    assert not (imports(name) & tools), f"{name} imports {imports(name) & tools}"


def top(names: set[str]) -> set[str]:
    return {n.split(".")[0] for n in names}


@pytest.mark.parametrize("name", sorted(MODULES))
def test_matplotlib_and_click_only_where_allowed(name):
    level = top(imports(name, top_level_only=True))
    if name not in MATPLOTLIB_OK:
        assert "matplotlib" not in level, f"{name} imports matplotlib at module level"
    if name not in CLICK_OK:
        assert "click" not in top(imports(name)), f"{name} imports click"


def loaded_after(statement: str) -> set[str]:
    code = (f"import sys; {statement}; "
            "print(' '.join(sorted({m.split('.')[0] for m in sys.modules})))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          cwd=PACKAGE.parent, timeout=60)
    assert done.returncode == 0, done.stderr
    return set(done.stdout.split())


def test_import_okdecode_stays_light():
    # issue 2: heavy modules are imported only where they are needed
    assert not loaded_after("import okdecode") & {"scipy", "matplotlib", "click", "soundfile"}


def test_the_command_line_loads_no_signal_processing_to_start():
    assert not loaded_after("import okdecode.cli") & {"scipy", "matplotlib", "soundfile"}
