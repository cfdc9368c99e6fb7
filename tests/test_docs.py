"""The documentation in docs/ against the code it describes, so that the two cannot drift.

* docs/file-format.md has a row for every variable and coordinate of the output registry
  (grmc.dataset), with the registry's dimensions and units, and no row for a name the
  registry does not hold; it has a row for every key of the scenario schema (grmc.scenario).
* Every reference into docs/ (a file, a link, a quoted section title) resolves, and no file
  of the repository points to a Markdown file that is not in the repository.

Rows marked "Added in this release" describe names other parts of this release register; for
them only the name is required to be present, since their final dimensions and units are
registered with them (the registry check above then covers the name).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from grmc.dataset import COORDINATES, VARIABLES
from grmc.scenario import SCHEMA

ROOT = Path(__file__).resolve().parent.parent
DOCS = ROOT / "docs"
FILE_FORMAT = DOCS / "file-format.md"
NEW = "Added in this release"

#: Pages that a part in progress adds to docs/ (listed in docs/README.md); a link to one of
#: them is accepted while it is not in this tree yet.  Empty: every listed page is in.
PENDING_PAGES: set[str] = set()

#: Names written outside the registry that the file-format page documents on purpose: the
#: sweep file's string variable ``method`` (exact or monte carlo per point).
DOCUMENTED_UNREGISTERED = {"method"}

_ROW = re.compile(r"^\|\s*`([A-Za-z_]\w*)`\s*\|([^|]*)\|\s*`([^`]*)`\s*\|(.*)\|\s*$")


def _tables(text: str, header: str) -> list[str]:
    """Body rows of every Markdown table whose header line is ``header``."""
    rows, inside = [], False
    for line in text.splitlines():
        stripped = line.strip()
        if stripped == header:
            inside = True
            continue
        if inside and stripped.startswith("|---"):
            continue
        if inside and stripped.startswith("|"):
            rows.append(stripped)
        else:
            inside = False
    return rows


def _variable_rows() -> dict[str, tuple[tuple[str, ...], str, bool]]:
    """name -> (dims, units, marked new) from the name | dims | units | meaning tables."""
    out = {}
    for row in _tables(FILE_FORMAT.read_text(), "| name | dims | units | meaning |"):
        m = _ROW.match(row)
        assert m, f"docs/file-format.md: not a `name` | dims | `units` | meaning row: {row}"
        name, dims, units, rest = m.groups()
        assert name not in out, f"docs/file-format.md: {name!r} has two rows"
        dims = dims.strip()
        out[name] = (() if dims == "-" else tuple(d.strip() for d in dims.split(",")), units,
                     NEW in rest)
    return out


def test_every_registered_name_has_a_row_with_its_dims_and_units():
    """The registry (grmc.dataset, the code's own contract) is the reference: every name has a
    row, and an established row states exactly the registered dims and UDUNITS string."""
    rows = _variable_rows()
    registry = {**COORDINATES, **VARIABLES}
    missing = sorted(set(registry) - set(rows))
    assert not missing, f"docs/file-format.md has no row for {missing}"
    for name, spec in registry.items():
        dims, units, new = rows[name]
        if new:
            continue
        assert dims == tuple(spec.dims), f"{name}: docs say dims {dims}, registry {spec.dims}"
        assert units == spec.units, f"{name}: docs say units {units!r}, registry {spec.units!r}"


def test_no_row_for_a_name_the_registry_does_not_hold():
    """A documented name that no file holds would mislead; only rows of this release's
    additions (registered by their own parts) may precede the registry."""
    registry = {**COORDINATES, **VARIABLES}
    extra = sorted(name for name, (_, _, new) in _variable_rows().items()
                   if not new and name not in registry)
    assert not extra, f"docs/file-format.md documents unregistered names {extra}"
    text = FILE_FORMAT.read_text()
    for name in DOCUMENTED_UNREGISTERED:
        assert f"`{name}`" in text


def test_every_scenario_key_has_a_row():
    """Every key of the scenario schema (grmc.scenario.SCHEMA) is documented under its
    section, and the table names no key the schema lacks unless it is marked new."""
    rows = _tables(FILE_FORMAT.read_text(), "| section | key | type, range, default | meaning |")
    documented: dict[str, set[str]] = {}
    new_keys: set[tuple[str, str]] = set()
    for row in rows:
        cells = [c.strip() for c in row.strip("|").split("|")]
        section = cells[0].strip("`[]") or "(top)"
        key = cells[1].strip("`")
        documented.setdefault(section, set()).add(key)
        if NEW in cells[3]:
            new_keys.add((section, key))
    for section, keys in SCHEMA.items():
        missing = sorted(set(keys) - documented.get(section, set()))
        assert not missing, f"docs/file-format.md: [{section}] keys {missing} are not documented"
    for section, keys in documented.items():
        if section == "(top)":
            continue
        assert section in SCHEMA, f"docs/file-format.md: unknown section [{section}]"
        extra = sorted(k for k in keys - set(SCHEMA[section]) if (section, k) not in new_keys)
        assert not extra, f"docs/file-format.md: [{section}] documents unknown keys {extra}"


def _slug(title: str) -> str:
    """The anchor a Markdown heading gets (GitHub's rule: lower case, punctuation other than
    '-' and '_' dropped, spaces to '-'; common practice)."""
    return re.sub(r"[^\w\- ]", "", title.strip().lower()).replace(" ", "-")


def _headings(path: Path) -> set[str]:
    return {m.group(1).strip() for m in re.finditer(r"^#+\s+(.+)$", path.read_text(), re.M)}


def _sources() -> list[Path]:
    files = [ROOT / n for n in ("README.md", "DEVELOPERS.md", "CHANGELOG.md")]
    for folder, pattern in (("grmc", "**/*.py"), ("tests", "*.py"), ("docs", "*.md"),
                            ("benchmarks", "*"), ("scenarios", "*.toml")):
        files += sorted(p for p in (ROOT / folder).glob(pattern) if p.is_file())
    return [p for p in files if p.exists()]


def _resolve(mention: str, where: Path) -> Path | None:
    """The repository file a Markdown-file mention in ``where`` points to, or None."""
    for base in (where.parent, ROOT, DOCS):
        target = (base / mention).resolve()
        if target.is_file() and target.is_relative_to(ROOT):
            return target
    return None


def test_every_markdown_file_mentioned_is_in_the_repository():
    """A clone holds everything the code and the docs point to: every *.md named in the
    package, the tests, the benchmarks, the scenarios and the docs is a file of this
    repository (or a page this release adds, see PENDING_PAGES)."""
    bad = []
    for path in _sources():
        for m in re.finditer(r"[\w./-]*[\w-]\.md\b", path.read_text(errors="replace")):
            mention = m.group(0)
            if _resolve(mention, path) is None and Path(mention).name not in PENDING_PAGES:
                bad.append(f"{path.relative_to(ROOT)}: {mention}")
    assert not bad, "references to Markdown files not in the repository: " + "; ".join(bad)


def test_links_and_quoted_sections_resolve():
    """Links between pages (``[the sources](physics-notes.md#sources)``) reach an existing page and
    heading, and a quoted section title after a page name
    (``docs/physics-notes.md "One-level G-R noise"``) is a heading of that page."""
    bad = []
    for path in _sources():
        text = path.read_text(errors="replace")
        for m in re.finditer(r"\]\(([\w./-]+\.md)(?:#([\w-]+))?\)", text):
            page, anchor = m.groups()
            target = _resolve(page, path)
            if target is None:
                if Path(page).name not in PENDING_PAGES:
                    bad.append(f"{path.relative_to(ROOT)}: link to {page}")
                continue
            if anchor and anchor not in {_slug(h) for h in _headings(target)}:
                bad.append(f"{path.relative_to(ROOT)}: no heading #{anchor} in {page}")
        for m in re.finditer(r"\]\(#([\w-]+)\)", text):
            if path.suffix == ".md" and m.group(1) not in {_slug(h) for h in _headings(path)}:
                bad.append(f"{path.relative_to(ROOT)}: no heading #{m.group(1)}")
        for m in re.finditer(r"docs/([\w-]+\.md),?\s+\"([^\"\n]+)\"", text):
            page, title = m.groups()
            if title not in _headings(DOCS / page):
                bad.append(f"{path.relative_to(ROOT)}: no section {title!r} in docs/{page}")
    assert not bad, "; ".join(bad)


@pytest.mark.parametrize("title", ["One-level G-R noise", "Photoconductor G-R current noise"])
def test_cited_physics_sections_exist(title):
    """Docstrings and tests cite these physics sections by title; they must stay headings (a
    renamed heading would silently orphan the citations the previous test finds)."""
    assert title in _headings(DOCS / "physics-notes.md")
