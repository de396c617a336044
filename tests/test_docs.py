"""Docs that cannot drift: what README.md and DEVELOPERS.md say about the commands, the YAML keys,
the benchmark's figures and the code is checked against the code itself."""

from __future__ import annotations

import importlib.util
import json
import re
from pathlib import Path

import click
import pytest

from toolkit.cli import main
from toolkit.config import registry
from toolkit.config.registry import BASELINES, MEASURES, Key

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "README.md"
DEVELOPERS = ROOT / "DEVELOPERS.md"
RESULTS = ROOT / "benchmarks" / "RESULTS.md"


def section(text: str, heading: str) -> str:
    """The text under ``heading`` (a whole line) up to the next heading of the same or a higher level."""
    level = heading.split(" ", 1)[0]
    start = text.index(f"\n{heading}\n") + len(heading) + 2
    ends = [m.start() for m in re.finditer(rf"^#{{1,{len(level)}}} ", text[start:], re.M)]
    return text[start:start + ends[0]] if ends else text[start:]


def code_spans(text: str) -> list[str]:
    """Every inline code span outside fenced blocks, and every line of a fenced block, whitespace
    collapsed. A command line goes on over a line ending in a backslash and over indented lines."""
    found: list[str] = []
    for number, part in enumerate(re.split(r"^```.*$", text, flags=re.M)):
        if number % 2:  # inside a fence
            for line in part.replace("\\\n", " ").splitlines():
                if found and line[:1] == " " and COMMAND_LINE.match(found[-1]):
                    found[-1] += " " + line.strip()
                elif line.strip():
                    found.append(line)
        else:
            found += re.findall(r"`([^`]+)`", part)
    return [" ".join(span.split()) for span in found]


# ── commands ────────────────────────────────────────────────────────────────────────────────────────

# a command at the start of a line of code, after its folder (``~/.plimsoll/bin/plimsoll``), or after
# ``&&``, ``;`` or `` | ``; what follows it up to a comment or the next command
COMMAND_LINE = re.compile(r"^(?:\S*/)?plimsoll ([a-z][a-z-]*)\b(.*)$")
FLAG = re.compile(r"(?<![\w-])(--?[a-z][a-z-]*)")


def options(command: click.Command) -> list[click.Option]:
    return [p for p in command.params if isinstance(p, click.Option) and p.name != "help"]


def flags(command: click.Command) -> set[str]:
    return {flag for option in options(command) for flag in (*option.opts, *option.secondary_opts)} | {"-h", "--help"}


def synopsis_flags(synopsis: str) -> dict[str, tuple[bool, bool]]:
    """Each flag of a synopsis such as ``plimsoll x --out FILE [--check NAME]...``: whether it is
    outside brackets (required) and whether its brackets are followed by ``...`` (repeatable).
    Brackets inside quotes (``'[CHECK:]KEY=VALUE'``) are text."""
    plain = re.sub(r"'[^']*'", lambda m: " " * len(m.group()), synopsis)
    opened: list[int] = []
    closes: dict[int, int] = {}
    enclosing: dict[int, int | None] = {}
    for at, char in enumerate(plain):
        if char == "[":
            opened.append(at)
        elif char == "]":
            closes[opened.pop()] = at
        elif char == "-" and (at == 0 or plain[at - 1] in " ["):
            enclosing[at] = opened[0] if opened else None
    assert not opened, f"unbalanced brackets in {synopsis!r}"
    found = {}
    for match in FLAG.finditer(plain):
        outer = enclosing.get(match.start())
        repeatable = outer is not None and plain[closes[outer] + 1:closes[outer] + 4] == "..."
        found[match.group(1)] = (outer is None, repeatable)
    return found


def commands_section() -> dict[str, tuple[str, str]]:
    """The README's list under '## Commands': command name -> (synopsis, what follows it)."""
    text = section(README.read_text(encoding="utf-8"), "## Commands")
    items = re.findall(r"^- `(plimsoll [^`]+)`:\s+(.+?)(?=^- |\Z)", text, re.M | re.S)
    listed = {}
    for synopsis, rest in items:
        synopsis = " ".join(synopsis.split())
        name = synopsis.split()[1]
        assert name not in listed, f"{name} is listed twice under '## Commands'"
        listed[name] = (synopsis, " ".join(rest.split()))
    return listed


def summary(command: click.Command) -> str:
    """The first paragraph of a command's help: its summary in `plimsoll --help`."""
    return " ".join((command.help or "").strip().split("\n\n")[0].split())


def test_the_readme_lists_every_command_and_no_other() -> None:
    assert sorted(commands_section()) == sorted(main.commands)


@pytest.mark.parametrize("name", sorted(main.commands))
def test_each_command_is_in_the_readme_with_its_summary_and_every_option(name: str) -> None:
    command = main.commands[name]
    synopsis, described = commands_section()[name]
    assert re.match(re.escape(summary(command).rstrip(".")) + r"[.;:]", described), (described, summary(command))
    documented = synopsis_flags(synopsis)
    for option in options(command):
        named = [f for f in (*option.opts, *option.secondary_opts) if f in documented]
        assert named, f"README '## Commands': `plimsoll {name}` does not show {option.opts[-1]}"
        required, repeatable = documented[named[0]]
        assert required == option.required, f"{name} {named[0]}: required is {option.required}, not as shown"
        assert repeatable == option.multiple, f"{name} {named[0]}: repeatable is {option.multiple}, not as shown"


def synopses() -> list[str]:
    """Every synopsis in the README: a command line in code that shows optional parts in brackets."""
    return [span[span.index("plimsoll "):] for span in code_spans(README.read_text(encoding="utf-8"))
            if re.match(r"^(\S*/)?plimsoll [a-z]+ .*\[", span)]


def test_every_synopsis_in_the_readme_shows_exactly_the_commands_options() -> None:
    found = synopses()
    assert len(found) >= len(main.commands) + 4  # the list, and alerts, report, notify and backtest again
    for synopsis in found:
        command = main.commands[synopsis.split()[1]]
        shown = synopsis_flags(synopsis)
        assert set(shown) <= flags(command), f"{synopsis}: no such option {sorted(set(shown) - flags(command))}"
        missing = [o.opts[-1] for o in options(command) if not set(o.opts) & set(shown)]
        assert not missing, f"{synopsis}: does not show {missing}"


@pytest.mark.parametrize("doc", [README, DEVELOPERS], ids=lambda p: p.name)
def test_every_command_line_in_the_docs_names_a_command_and_its_options(doc: Path) -> None:
    used = 0
    for span in code_spans(doc.read_text(encoding="utf-8")):
        lines = [COMMAND_LINE.match(part.split(" #")[0].strip()) for part in re.split(r"&&|;| \| ", span)]
        for name, rest in (line.groups() for line in lines if line):
            assert name in main.commands, f"{doc.name}: `{span}`: there is no command 'plimsoll {name}'"
            unknown = set(FLAG.findall(re.sub(r"'[^']*'", "", rest))) - flags(main.commands[name])
            assert not unknown, f"{doc.name}: `{span}`: plimsoll {name} has no option {sorted(unknown)}"
            used += 1
    assert used >= 5


# ── YAML keys ───────────────────────────────────────────────────────────────────────────────────────

# Each key table of the registry, and the line of README's YAML reference that leads its table
KEY_TABLES = {
    "PROJECT_KEYS": r"### `plimsoll.yml`",
    "SOURCE_KEYS": r"Each source:",
    "WEBHOOK_KEYS": r"Each webhook \(`webhooks:` is a list\):",
    "NOTIFY_KEYS": r"`notify`:",
    "SMTP_KEYS": r"`smtp` \(for `email`\):",
    "EMAIL_KEYS": r"Each list of mail recipients \(`email:` is a list\):",
    "STORAGE_KEYS": r"`storage` \(.*\):",
    "CATALOG_KEYS": r"`iceberg_catalog`:",
    "CHECK_KEYS": r"### Check files",
    "WINDOW_KEYS": r"`window`: .*",
    "GUARD_KEYS": r"`guard`:",
    "LIFECYCLE_KEYS": r"`lifecycle`:",
    "MEASURE_KEYS": None,   # `kind`: the measures' table below, one row per kind
    "BASELINE_KEYS": None,  # `method`: the baselines' table below, one row per method
}


def table_after(text: str, lead: str) -> list[list[str]]:
    """The rows (cells, without header) of the first Markdown table after the line matching ``lead``."""
    lines = text.splitlines()
    starts = [i for i, line in enumerate(lines) if re.fullmatch(lead, line)]
    assert len(starts) == 1, f"README's YAML reference: {len(starts)} lines match {lead!r}"
    at = starts[0] + 1
    while not lines[at].startswith("|"):
        assert not lines[at].startswith("#"), f"no table after {lead!r}"
        at += 1
    rows = []
    while at < len(lines) and lines[at].startswith("|"):
        rows.append([c.strip() for c in re.split(r"(?<!\\)\|", lines[at].strip())[1:-1]])
        at += 1
    return rows[2:]


def shown_default(value: object) -> str:
    """A default as YAML writes it: `false`, `[]`, `""`, `1`, `0.5`, `7d`."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    if value == "":
        return '""'
    if value == []:
        return "[]"
    return str(value)


def yaml_reference() -> str:
    return section(README.read_text(encoding="utf-8"), "## YAML reference")


def test_every_key_table_of_the_code_has_a_table_in_the_readme() -> None:
    in_code = {name for name, value in vars(registry).items()
               if name.endswith("_KEYS") and isinstance(value, tuple) and all(isinstance(k, Key) for k in value)}
    assert in_code == set(KEY_TABLES)


@pytest.mark.parametrize("table", [t for t, lead in KEY_TABLES.items() if lead], ids=str)
def test_each_key_table_is_the_readmes_yaml_reference_table(table: str) -> None:
    keys: tuple[Key, ...] = getattr(registry, table)
    rows = table_after(yaml_reference(), KEY_TABLES[table])
    documented = [row[0] for row in rows]
    assert sorted(documented) == sorted(f"`{k.name}`" for k in keys), \
        f"README's table after {KEY_TABLES[table]!r} documents {documented}; the code has {[k.name for k in keys]}"
    for key in keys:
        (row,) = [r for r in rows if r[0] == f"`{key.name}`"]
        second = row[1]
        if second in ("yes", "required") or second.startswith("no"):  # a 'required' column, or 'default' saying so
            assert (second in ("yes", "required")) == key.required, f"{key.name}: required is {key.required}: {row}"
        else:
            assert not key.required, f"{key.name} is required, the README's table does not say so: {row}"
        if key.default is not None:
            assert f"`{shown_default(key.default)}`" in second, f"{key.name}: default {key.default!r} not in {row}"


@pytest.mark.parametrize("kinds,lead,chooser", [(MEASURES, r"Measures \(`measure.kind`\):", "MEASURE_KEYS"),
                                               (BASELINES, r"Baselines \(`baseline.method`\):", "BASELINE_KEYS")],
                         ids=["measures", "baselines"])
def test_each_measure_kind_and_baseline_method_has_its_keys_in_the_readme(kinds: dict, lead: str,
                                                                         chooser: str) -> None:
    (choosing,) = getattr(registry, chooser)
    assert f"`{kinds is MEASURES and 'measure' or 'baseline'}.{choosing.name}`" in lead.replace("\\", "")
    rows = {row[0].split()[0]: row for row in table_after(yaml_reference(), lead)}
    assert sorted(rows) == sorted(f"`{name}`" for name in kinds), f"README's rows: {sorted(rows)}"
    for name, kind in kinds.items():
        row = rows[f"`{name}`"]
        assert sorted(re.findall(r"`([a-z_]+)`", row[1])) == sorted(k.name for k in kind.keys), (name, row[1])
        assert ("(rate only)" in row[0]) == kind.rate_only, row[0]
        for key in kind.keys:
            if key.default is not None:
                assert f"`{key.name}` (default {shown_default(key.default)})" in row[1], (name, key.name, row[1])


# ── the benchmark's figures: one page ───────────────────────────────────────────────────────────────

RESULTS_JSON = ROOT / "benchmarks" / "results.json"


def bench():
    spec = importlib.util.spec_from_file_location("bench", ROOT / "benchmarks" / "bench.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_the_benchmark_page_is_what_the_last_runs_figures_give() -> None:
    figures = json.loads(RESULTS_JSON.read_text(encoding="utf-8"))
    assert RESULTS.read_text(encoding="utf-8") == bench().results_page(figures), \
        "benchmarks/RESULTS.md: python benchmarks/bench.py --page benchmarks/results.json > benchmarks/RESULTS.md"


FIGURE_CELL = re.compile(r"^[\d,.]+(\s*(s|ms|MiB|GiB|MB|GB|%))?$")


@pytest.mark.parametrize("doc", [README, DEVELOPERS], ids=lambda p: p.name)
def test_no_other_doc_repeats_the_benchmarks_figures(doc: Path) -> None:
    figures = json.loads(RESULTS_JSON.read_text(encoding="utf-8"))
    measured = {f"{r['seconds']:.1f}" for r in figures["results"].values()}
    measured |= {f"{r['peak_mib']:,.0f}" for r in figures["results"].values() if r["peak_mib"] >= 1000}
    measured |= {f"{r['value']:.3f}" for r in figures["ratios"]}
    text = doc.read_text(encoding="utf-8")
    repeated = sorted(m for m in measured if re.search(rf"(?<![\w.,]){re.escape(m)}(?![\d,]|\.\d)", text))
    assert not repeated, f"{doc.name} repeats figures of benchmarks/RESULTS.md: {repeated}; link to it instead"
    for line in text.splitlines():
        if line.startswith("|"):
            cells = [c.strip() for c in line.strip().strip("|").split("|")]
            assert not [c for c in cells if FIGURE_CELL.match(c)], f"{doc.name}: a table of figures: {line}"
    assert "(benchmarks/RESULTS.md)" in text


# ── the contributor guide names what exists ─────────────────────────────────────────────────────────

REPOSITORY_PATH = re.compile(r"^(toolkit|queries|tests|benchmarks|checks|warehouse_demo)/[\w./-]*$")


def developers_spans() -> list[str]:
    return re.findall(r"`([^`\n]+)`", DEVELOPERS.read_text(encoding="utf-8"))


def test_every_path_the_contributor_guide_names_exists() -> None:
    paths = [span for span in developers_spans() if REPOSITORY_PATH.match(span)]
    assert len(paths) > 40
    missing = sorted({p for p in paths if not (ROOT / p).exists()})
    assert not missing, f"DEVELOPERS.md names files that do not exist: {missing}"


def test_every_test_module_is_in_the_contributor_guide() -> None:
    named = set(re.findall(r"`(tests/[\w/]+\.py)`", DEVELOPERS.read_text(encoding="utf-8")))
    modules = {p.relative_to(ROOT).as_posix() for p in (ROOT / "tests").glob("test_*.py")}
    assert not modules - named, f"DEVELOPERS.md does not say what these test: {sorted(modules - named)}"


def test_every_module_attribute_the_contributor_guide_names_exists() -> None:
    modules = {p.stem: p for p in (ROOT / "toolkit").rglob("*.py") if p.stem != "__init__"}
    checked = 0
    for span in developers_spans():
        found = re.fullmatch(r"(\w+)\.([A-Za-z_]\w*)", span)
        if not found or found.group(1) not in modules or found.group(2) in ("py", "sql", "yml", "html", "json"):
            continue
        module, name = found.groups()
        source = modules[module].read_text(encoding="utf-8")
        assert re.search(rf"^(def |class )?{name}\b", source, re.M), f"DEVELOPERS.md: `{span}`: no {name} in {modules[module]}"
        checked += 1
    assert checked >= 5


def test_every_constant_the_contributor_guide_names_exists() -> None:
    corpus = " ".join(p.read_text(encoding="utf-8") for folder in ("toolkit", "tests", "benchmarks", "queries")
                      for p in (ROOT / folder).rglob("*") if p.suffix in (".py", ".sql"))
    constants = {s for s in developers_spans() if re.fullmatch(r"[A-Z][A-Z0-9_]{3,}", s)}
    assert len(constants) >= 5
    missing = sorted(c for c in constants if not re.search(rf"\b{c}\b", corpus))
    assert not missing, f"DEVELOPERS.md names constants the code does not have: {missing}"


@pytest.mark.parametrize("doc", [README, DEVELOPERS], ids=lambda p: p.name)
def test_no_table_is_split_or_ragged(doc: Path) -> None:
    """A blank line inside a Markdown table ends it: the rows after it show as a paragraph of pipes
    (the baselines table once lost its `ewma` row so). Every row has its header's number of cells."""
    lines = doc.read_text(encoding="utf-8").split("\n")
    fenced = False
    header: int | None = None
    for number, line in enumerate(lines, 1):
        if line.startswith("```"):
            fenced = not fenced
        if fenced:
            continue
        if line.startswith("|"):
            cells = len(re.findall(r"(?<!\\)\|", line)) - 1
            if header is None:
                header = cells
            assert cells == header, f"{doc.name}:{number}: {cells} cells, the table's header has {header}"
            continue
        header = None
        if not line.strip() and number < len(lines) and lines[number].startswith("|"):
            previous = lines[number - 2] if number >= 2 else ""
            assert not previous.startswith("|"), f"{doc.name}:{number}: a blank line splits a table"
