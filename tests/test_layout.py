"""The package's layering: the stages never import the synthetic data generators."""

import ast
from pathlib import Path

import ringid

PACKAGE = Path(ringid.__file__).parent
#: the commands that exist to drive the simulator (``ringid demo``, ``ringid simulate``)
DRIVERS = {PACKAGE / "commands" / "demo.py", PACKAGE / "commands" / "simulate.py"}


def imported_modules(path: Path) -> set[str]:
    """Every module an import statement of the file names, function-level imports included."""
    names = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
            names.update(f"{node.module}.{a.name}" for a in node.names)
    return names


def test_no_production_module_imports_synthetic():
    offenders = []
    for path in sorted(PACKAGE.rglob("*.py")):
        if path.is_relative_to(PACKAGE / "synthetic") or path in DRIVERS:
            continue
        if any(m == "ringid.synthetic" or m.startswith("ringid.synthetic.") for m in imported_modules(path)):
            offenders.append(str(path.relative_to(PACKAGE)))
    assert offenders == []


def test_every_import_is_absolute_within_the_stages():
    """Stage modules import each other as ``ringid.<stage>.<module>`` (the tree reads like the data flow)."""
    relative = []
    for path in sorted(PACKAGE.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.level and not path.is_relative_to(PACKAGE / "commands"):
                relative.append(f"{path.relative_to(PACKAGE)}:{node.lineno}")
    assert relative == []


def test_ruff_finds_nothing():
    """The linter configured in pyproject.toml (pyflakes and pycodestyle rules, lines ≤ 120) is clean."""
    import subprocess
    import sys

    root = PACKAGE.parent
    run = subprocess.run([sys.executable, "-m", "ruff", "check", "--no-cache", "ringid", "tests", "benchmarks"],
                         cwd=root, capture_output=True, text=True)
    assert run.returncode == 0, run.stdout + run.stderr


def test_identification_defaults_have_one_value():
    """The config schema's identify defaults are the Python constants the code and the CLI use."""
    import yaml

    from ringid.identify import windows

    schema = yaml.safe_load((PACKAGE.parent / "config" / "config.schema.yaml").read_text(encoding="utf-8"))
    props = schema["properties"]["identify"]["properties"]
    assert props["dilation_window_standard"]["default"] == windows.WINDOW_STANDARD
    assert props["dilation_window_nominal"]["default"] == windows.WINDOW_NOMINAL
    assert props["false_identification_rate"]["default"] == windows.FALSE_IDENTIFICATION_RATE
    config = yaml.safe_load((PACKAGE.parent / "config" / "config.yaml").read_text(encoding="utf-8"))
    assert config["identify"] == {"dilation_window_standard": windows.WINDOW_STANDARD,
                                  "dilation_window_nominal": windows.WINDOW_NOMINAL,
                                  "false_identification_rate": windows.FALSE_IDENTIFICATION_RATE}
