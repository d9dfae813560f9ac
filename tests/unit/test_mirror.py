"""The tests mirror the package: every module ``pipeline/<path>/<name>.py`` (``__init__.py``
aside) has its test file ``tests/unit/<path>/test_<name>.py``, and every test folder is a
package (an ``__init__.py``), so two test files of one name in two folders do not collide.

A test file may hold more than its module's tests (a test that reads two modules lives with
its main one); other test files of a folder (``test_<name>_<topic>.py``) are allowed.
"""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = ROOT / "pipeline"
UNIT = ROOT / "tests" / "unit"


def expected_test(module: Path) -> Path:
    rel = module.relative_to(PACKAGE)
    return UNIT / rel.parent / f"test_{rel.name}"


def modules() -> list[Path]:
    return sorted(p for p in PACKAGE.rglob("*.py") if p.name != "__init__.py")


def test_every_module_has_its_test_file():
    missing = [
        str(expected_test(m).relative_to(ROOT)) for m in modules() if not expected_test(m).is_file()
    ]
    assert missing == []


def test_every_test_folder_is_a_package():
    folders = {p.parent for p in (ROOT / "tests").rglob("test_*.py")}
    assert (
        sorted(str(f.relative_to(ROOT)) for f in folders if not (f / "__init__.py").is_file()) == []
    )


def test_no_test_file_stands_for_a_module_that_is_gone():
    # tests/unit/<path>/test_<name>.py where pipeline/<path>/ exists names a module of it, or
    # is a topic file test_<module>_<topic>.py of one
    for test in UNIT.rglob("test_*.py"):
        folder = PACKAGE / test.parent.relative_to(UNIT)
        if test.parent == UNIT or not folder.is_dir():
            continue
        stem = test.stem.removeprefix("test_")
        names = [p.stem for p in folder.glob("*.py")] + [
            p.name for p in folder.iterdir() if p.is_dir()
        ]
        assert any(stem == n or stem.startswith(n + "_") for n in names), test
