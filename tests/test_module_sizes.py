"""One concept per module: nothing in ``server/`` or ``web/`` over :data:`LIMIT` lines.

The numerical kernels in ``server/indicators`` are exempt (a method with its variants and
references reads best in one file). The limit is common practice, no source (issue 10: "about
100-400 lines; nothing over 500"); the last modules over it were split in December 2026, so there
is no allow-list any more.
"""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
LIMIT = 500
CHECKED = ("server", "web")
EXEMPT = ("server/indicators",)



def lines_of(path: Path) -> int:
    with path.open(encoding="utf-8") as f:
        return sum(1 for _ in f)


def oversized(root: Path = ROOT, limit: int = LIMIT) -> dict[str, int]:
    """Checked modules over ``limit`` lines: path relative to ``root`` -> lines."""
    out = {}
    for folder in CHECKED:
        for path in sorted((root / folder).rglob("*.py")):
            rel = path.relative_to(root).as_posix()
            if any(rel.startswith(e + "/") for e in EXEMPT):
                continue
            n = lines_of(path)
            if n > limit:
                out[rel] = n
    return out


def test_oversized_finds_a_long_module_and_skips_the_kernels(tmp_path: Path) -> None:
    (tmp_path / "server/services").mkdir(parents=True)
    (tmp_path / "server/indicators").mkdir(parents=True)
    (tmp_path / "web").mkdir()
    (tmp_path / "server/services/long.py").write_text("x = 1\n" * 501)
    (tmp_path / "server/services/short.py").write_text("x = 1\n" * 500)
    (tmp_path / "server/indicators/kernel.py").write_text("x = 1\n" * 900)
    (tmp_path / "web/page.py").write_text("x = 1\n" * 600)
    assert oversized(tmp_path) == {"server/services/long.py": 501, "web/page.py": 600}


def test_no_new_module_over_the_limit() -> None:
    new = oversized()
    assert new == {}, f"split these by concept (at most {LIMIT} lines): {new}"
