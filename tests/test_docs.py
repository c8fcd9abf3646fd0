"""The docs cannot drift: every config key, CLI subcommand and option, and REST route of the
package must appear in README.md, DEVELOPERS.md or a docs/ page the README links to.

README.md is what a user reads first; the full reference tables (settings, routes, options)
live in docs/ pages it links (``[…](docs/configuration.md)``). A page the README does not link
counts for nothing here: a reader could not find it from the README.

Knows the docs' Markdown conventions and the package's public config models, argument parser
and HTTP app; nothing of the service's internals.

What counts as documented (the same rules for both files):

* **Config key** — its TOML name (the field's alias, else its name), for every field of every
  model reachable from ``service.config.Config``, appears as code: a code span that is the key
  (`` `lowcut_hz` ``) or a dotted path ending in it (`` `service.listen` ``), an assignment
  ``key = …`` in a code span or fenced block, or a TOML table header ``[service]`` or
  ``[[tokens]]`` anywhere (bold table titles count: the brackets are unambiguous). A word in
  prose, an option ``--speed`` or a longer name (``replay_speed``) does not document ``speed``.
  Keys are matched by name, not by table: a name used in two tables is documented once.
* **CLI** — a subcommand is documented where ``quaver NAME`` appears; an option of that
  subcommand where one of its option strings (``-c`` or ``--config``) appears as a whole token
  on a line that also names ``quaver NAME``, or under a heading that does. So ``--json``
  documented for ``quaver bench`` does not document ``quaver analyze --json``.
* **Route** — every path the app serves under ``/api/v1/``, and ``/metrics``, appears in full.
  Path parameters compare by position, not by name: ``{channel_id}`` in the code and ``{id}``
  in the docs are the same parameter (both become ``{}``). A parameter must be written as a
  placeholder in braces; an example value (``/channels/p1-de-h/bands``) does not document
  the route, because a reader cannot tell which segment varies.
"""

from __future__ import annotations

import argparse
import re
import types
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Annotated, Any, Union, get_args, get_origin

import pytest
from fastapi import FastAPI
from pydantic import BaseModel, Field, create_model

from service.api import create_app
from service.cli import build_parser
from service.config import Config, describe_settings
from service.hub import Hub

REPO = Path(__file__).resolve().parents[1]
README = REPO / "README.md"
CAUTION_FILES = (README, REPO / "DEVELOPERS.md")
ROUTE_PREFIX = "/api/v1/"
EXTRA_ROUTES = ("/metrics",)
CAUTION = "not a machine-protection or safety system"


# a Markdown link to a page under docs/: [text](docs/x.md) or [text](docs/x.md#anchor)
DOCS_LINK = re.compile(r"\]\((docs/[\w.-]+\.md)(?:#[\w.-]*)?\)")


def linked_pages(text: str) -> list[str]:
    """The docs/ pages ``text`` links to, in order of first mention, each once."""
    return list(dict.fromkeys(DOCS_LINK.findall(text)))


def doc_files(root: Path = REPO) -> list[Path]:
    """README.md, DEVELOPERS.md and every docs/ page the README links to."""
    readme = root / "README.md"
    pages = linked_pages(readme.read_text(encoding="utf-8"))
    return [readme, root / "DEVELOPERS.md", *(root / p for p in pages)]


def read_docs(files: Iterable[Path] | None = None) -> str:
    files = doc_files() if files is None else files
    return "\n\n".join(p.read_text(encoding="utf-8") for p in files if p.is_file())


# --- Markdown pieces ------------------------------------------------------------------------

FENCE = re.compile(r"^(```|~~~)")
CODE_SPAN = re.compile(r"(`+)(.+?)\1")


def fenced_lines(text: str) -> list[str]:
    out, inside = [], False
    for line in text.splitlines():
        if FENCE.match(line.strip()):
            inside = not inside
        elif inside:
            out.append(line)
    return out


def code_spans(text: str) -> list[str]:
    """Inline code spans, outside fenced blocks, stripped (`` `x` `` and ``` ``x`` ```)."""
    out, inside = [], False
    for line in text.splitlines():
        if FENCE.match(line.strip()):
            inside = not inside
        elif not inside:
            out += [m.group(2).strip() for m in CODE_SPAN.finditer(line)]
    return out


def lines_in_context(text: str) -> Iterator[tuple[str, str]]:
    """(line, context) pairs: the context is the line with its enclosing headings."""
    headings: dict[int, str] = {}
    inside = False
    for line in text.splitlines():
        if FENCE.match(line.strip()):
            inside = not inside
        m = None if inside else re.match(r"^(#{1,6})\s+(.*)$", line)
        if m:
            level = len(m.group(1))
            headings = {k: v for k, v in headings.items() if k < level}
            headings[level] = m.group(2)
        yield line, " ".join([*headings.values(), line])


# --- config keys ----------------------------------------------------------------------------


def _models_in(ann: Any) -> list[type[BaseModel]]:
    """The pydantic models inside an annotation (through Annotated, unions, list, dict)."""
    if isinstance(ann, type) and issubclass(ann, BaseModel):
        return [ann]
    origin = get_origin(ann)
    if origin is Annotated:
        return _models_in(get_args(ann)[0])
    if origin in (Union, types.UnionType, list, tuple, set, frozenset, dict):
        return [m for a in get_args(ann) for m in _models_in(a)]
    return []


def config_keys(model: type[BaseModel] = Config, prefix: str = "") -> dict[str, list[str]]:
    """TOML key → the key paths where it occurs, for every field reachable from ``model``."""
    out: dict[str, list[str]] = {}
    for name, f in model.model_fields.items():
        key = f.alias or name
        path = prefix + key
        out.setdefault(key, []).append(path)
        subs = _models_in(f.annotation)
        many = get_origin(f.annotation) is list
        for sub in subs:
            tag = sub.model_fields.get("kind")
            if len(subs) > 1 and tag is not None and get_args(tag.annotation):
                where = f"{path}[kind={get_args(tag.annotation)[0]!r}]"  # one of a union
            else:
                where = path + ("[]" if many else "")
            for k, paths in config_keys(sub, where + ".").items():
                out.setdefault(k, []).extend(paths)
    return out


def key_documented(key: str, text: str) -> bool:
    k = re.escape(key)
    as_code = re.compile(rf"^(\[\[?)?([\w-]+\.)*{k}(\]\]?)?$")
    assignment = re.compile(rf"(?<![\w.-]){k}\s*=(?!=)")
    table_header = re.compile(rf"(?<![\w\[])\[\[?([\w-]+\.)*{k}\]\]?(?![\w\](])")
    spans = code_spans(text)
    if any(as_code.match(s) for s in spans) or table_header.search(text):
        return True
    return any(assignment.search(s) for s in [*spans, *fenced_lines(text)])


def missing_config_keys(text: str, model: type[BaseModel] = Config) -> list[str]:
    """``key  (where it is)`` for every key the docs do not show."""
    return [
        f"{key}  ({', '.join(paths)})"
        for key, paths in sorted(config_keys(model).items())
        if not key_documented(key, text)
    ]


# --- CLI ------------------------------------------------------------------------------------


def cli_items(
    parser: argparse.ArgumentParser, command: str = "quaver"
) -> Iterator[tuple[str, tuple[str, ...]]]:
    """(command, option strings) for every option; (command, ()) for every (sub)command."""
    yield command, ()
    for action in parser._actions:  # argparse keeps no public list of its actions
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield from cli_items(sub, f"{command} {name}")
        elif action.option_strings and not isinstance(action, argparse._HelpAction):
            yield command, tuple(action.option_strings)


def missing_cli(text: str, parser: argparse.ArgumentParser, prog: str = "quaver") -> list[str]:
    missing = []
    pairs = list(lines_in_context(text))
    for command, options in cli_items(parser, prog):
        names_it = re.compile(rf"(?<![\w-]){re.escape(command)}(?![\w-])")
        if not options:
            if command != prog and not names_it.search(text):
                missing.append(command)
            continue
        tokens = [re.compile(rf"(?<![\w-]){re.escape(o)}(?![\w-])") for o in options]
        if not any(
            names_it.search(ctx) and any(t.search(line) for t in tokens) for line, ctx in pairs
        ):
            missing.append(f"{command} {'/'.join(options)}")
    return missing


# --- routes ---------------------------------------------------------------------------------

PARAM = re.compile(r"\{[^{}/]*\}")
_TAIL = r"[^\s`'\"|<>()\[\]?#,;*]*"
# a bare path (not the end of a longer file path), or the path part of an http(s) URL
DOC_PATH = re.compile(rf"(?:https?://[^/\s`<>]+|(?<![\w/.-]))(/(?:api/v1/|metrics){_TAIL})")


def normalise(path: str) -> str:
    """``/channels/{channel_id}/bands`` and ``/channels/{id}/bands`` → ``/channels/{}/bands``."""
    return PARAM.sub("{}", path).rstrip("/.:")


def app_paths(app: FastAPI) -> set[str]:
    """Every path the app serves under /api/v1/, and /metrics (HTTP and WebSocket)."""
    try:  # newer FastAPI keeps included routers lazily; this walks them
        from fastapi.routing import iter_route_contexts

        paths = {rc.path for rc in iter_route_contexts(app.routes) if rc.path}
    except ImportError:
        paths = {r.path for r in app.routes if getattr(r, "path", None)}
    return {p for p in paths if p.startswith(ROUTE_PREFIX) or p in EXTRA_ROUTES}


def missing_routes(text: str, app: FastAPI) -> list[str]:
    documented = {normalise(p) for p in DOC_PATH.findall(text)}
    return sorted(p for p in app_paths(app) if normalise(p) not in documented)


# --- the real docs --------------------------------------------------------------------------


@pytest.fixture(scope="module")
def docs() -> str:
    return read_docs()


def test_both_docs_exist_and_carry_the_caution():
    for p in CAUTION_FILES:
        text = p.read_text(encoding="utf-8")
        assert CAUTION in " ".join(text.split()), f"{p.name} lacks the caution"


def test_every_config_key_is_documented(docs):
    missing = missing_config_keys(docs)
    assert not missing, "config keys missing from the docs:\n  " + "\n  ".join(missing)


def test_every_cli_option_is_documented(docs):
    missing = missing_cli(docs, build_parser())
    assert not missing, "CLI items missing from the docs:\n  " + "\n  ".join(missing)


def test_every_route_is_documented(docs):
    missing = missing_routes(docs, create_app(Hub()))
    assert not missing, "routes missing from the docs:\n  " + "\n  ".join(missing)


def test_every_docs_page_is_linked_from_the_readme_and_exists():
    # a page nobody can reach from the README is as good as missing; a link to a page that
    # is not there is a broken promise
    linked = linked_pages(README.read_text(encoding="utf-8"))
    on_disk = sorted(f"docs/{p.name}" for p in (REPO / "docs").glob("*.md"))
    assert sorted(linked) == on_disk
    # the reference tables moved out of the README are among them
    assert {"docs/configuration.md", "docs/api.md", "docs/cli.md"} <= set(linked)


def test_only_linked_pages_count(tmp_path):
    (tmp_path / "docs").mkdir()
    (tmp_path / "DEVELOPERS.md").write_text("nothing here\n")
    (tmp_path / "docs" / "linked.md").write_text("`zz_made_up_hz`\n")
    (tmp_path / "docs" / "orphan.md").write_text("`zz_inner_ms = 3`\n")
    (tmp_path / "README.md").write_text(
        "See [the settings](docs/linked.md#top), [again](docs/linked.md) and docs/orphan.md.\n"
    )
    files = doc_files(tmp_path)
    assert [p.relative_to(tmp_path).as_posix() for p in files] == [
        "README.md", "DEVELOPERS.md", "docs/linked.md"
    ]
    text = read_docs(files)
    assert missing_config_keys(text, _Made) == [
        "nested  (nested)",
        "rows  (rows)",
        "zz-alias  (zz-alias)",
        "zz_inner_ms  (nested.zz_inner_ms, rows[].zz_inner_ms)",
    ]


def test_the_walk_covers_describe_settings():
    # describe_settings() is the config's own list of its keys (for --help and docs); the
    # walk above must find at least those, or it is missing a model.
    walked = set(config_keys())
    listed = {row[0].rsplit(" ", 1)[1] for row in describe_settings()}
    assert listed <= walked
    assert {"listen", "lowcut_hz", "replay_speed", "sha256", "on_delay_s"} <= walked


def test_the_app_serves_the_routes_the_design_names():
    # the design notes, "Interfaces (contract)": health, channels, spectrum, bands, tones, the
    # WebSocket stream and /metrics; the walk must see included routers and WebSockets.
    paths = {normalise(p) for p in app_paths(create_app(Hub()))}
    assert {
        "/api/v1/health",
        "/api/v1/channels",
        "/api/v1/channels/{}/spectrum",
        "/api/v1/channels/{}/bands",
        "/api/v1/channels/{}/tones",
        "/api/v1/stream",
        "/metrics",
    } <= paths


# --- the checks can fail --------------------------------------------------------------------


class _Inner(BaseModel):
    zz_inner_ms: int = 5


_Made = create_model(
    "_Made",
    zz_made_up_hz=(float, Field(1.0)),
    nested=(_Inner, Field(default_factory=_Inner)),
    rows=(list[_Inner], Field(default_factory=list)),
    renamed=(int, Field(2, alias="zz-alias")),
)


def test_made_up_config_key_is_reported():
    # a field's TOML name is its alias when it has one
    assert missing_config_keys("", _Made) == [
        "nested  (nested)",
        "rows  (rows)",
        "zz-alias  (zz-alias)",
        "zz_inner_ms  (nested.zz_inner_ms, rows[].zz_inner_ms)",
        "zz_made_up_hz  (zz_made_up_hz)",
    ]
    text = "`zz_made_up_hz`, `[nested]`, `[[rows]]`, `zz-alias` and\n```toml\nzz_inner_ms = 3\n```"
    assert missing_config_keys(text, _Made) == []


@pytest.mark.parametrize(
    ("text", "documented"),
    [
        ("`speed`", True),
        ("`sources.speed`", True),
        ("`speed = 2`", True),
        ("```toml\n  speed = 2  # x\n```", True),
        ('`{ window = "hann", speed = 3 }`', True),
        ("speed in prose", False),
        ("`quaver demo --speed 10`", False),
        ("`replay_speed`", False),
        ("`replay_speed = 1`", False),
        ("```sh\nQUAVER_SPEED=1 quaver demo\n```", False),
        ("`speed == 2`", False),
        ("**[[speed]] (all kinds)**", True),
        ("[analysis.speed]", True),
        ("[[speeds]]", False),
        ("see [speed](#speed)", False),  # a Markdown link, not a table header
    ],
)
def test_key_rule(text, documented):
    assert key_documented("speed", text) is documented


def test_made_up_cli_option_is_reported():
    ap = argparse.ArgumentParser(prog="quaver")
    sub = ap.add_subparsers(dest="command")
    p = sub.add_parser("frob")
    p.add_argument("-z", "--zz-made-up", type=int)
    p.add_argument("file")  # positionals are not options
    other = sub.add_parser("other")
    other.add_argument("--zz-made-up", type=int)
    assert missing_cli("", ap) == [
        "quaver frob",
        "quaver frob -z/--zz-made-up",
        "quaver other",
        "quaver other --zz-made-up",
    ]
    # named on a `quaver other` line only: still missing for frob
    text = "`quaver frob FILE` frobs.\n\n`quaver other --zz-made-up 3`"
    assert missing_cli(text, ap) == ["quaver frob -z/--zz-made-up"]
    # under a heading that names the subcommand, the short option is enough
    text += "\n\n### `quaver frob`\n\n| `-z N` | how much |\n"
    assert missing_cli(text, ap) == []
    # a shell comment in a fenced block is not a heading
    fenced = "## `quaver other`\n\n```sh\n# quaver frob is run like this\n-z 3\n```\n"
    assert "quaver frob -z/--zz-made-up" in missing_cli(fenced, ap)
    # `quaver frobnicate` is not `quaver frob`
    assert "quaver frob" in missing_cli("`quaver frobnicate`", ap)


def test_made_up_route_is_reported():
    app = FastAPI()

    @app.get("/api/v1/widgets/{widget_id}/zz")
    def zz(widget_id: str) -> str:
        return widget_id

    @app.websocket("/api/v1/zz-stream")
    async def stream(ws: Any) -> None:
        return None

    @app.get("/not-api")
    def other() -> str:
        return ""

    assert missing_routes("", app) == ["/api/v1/widgets/{widget_id}/zz", "/api/v1/zz-stream"]
    # a placeholder of any name documents the parameter; an example value does not
    assert missing_routes("`GET /api/v1/widgets/w1/zz`, `/api/v1/zz-stream`", app) == [
        "/api/v1/widgets/{widget_id}/zz"
    ]
    assert missing_routes("| `GET /api/v1/widgets/{id}/zz?x=1` | `/api/v1/zz-stream` |", app) == []
    # a longer path does not document its prefix
    assert missing_routes("`/api/v1/zz-stream/more`", app)[-1] == "/api/v1/zz-stream"


def test_route_rule_on_prose():
    found = DOC_PATH.findall(
        "All under `/api/v1/`; try <http://127.0.0.1:8750/api/v1/health>, scrape /metrics."
    )
    assert [normalise(p) for p in found] == ["/api/v1", "/api/v1/health", "/metrics"]


# --- citations of Markdown files ------------------------------------------------------------
#
# Tests, docstrings and docs cite the project's own Markdown files (docs/references.md for
# published sources). A cited file must be in the repository: a path outside it (absolute,
# or climbing out with ../) or a file that does not exist fails.

MD_CITATION = re.compile(r"(?<![\w/.-])((?:\.\./|/|~/)?[\w.-]+(?:/[\w.-]+)*\.md)\b")
CITING = ("dsp", "service", "tests", "web")
THIS = Path(__file__).resolve()


def bad_citations(text: str, where: Path) -> list[str]:
    """Markdown files ``text`` (the file ``where``) cites that are not in the repository."""
    out = []
    for m in MD_CITATION.finditer(text):
        token_start = max(text.rfind(c, 0, m.start()) for c in " \t\n(<[\"'") + 1
        if "://" in text[token_start:m.start()]:
            continue  # part of a URL
        # "README.md/DEVELOPERS.md" names two files: each is checked
        for cited in (c if c.endswith(".md") else f"{c}.md" for c in m.group(1).split(".md/")):
            if cited.startswith(("/", "../", "~/")):
                out.append(f"{where.relative_to(REPO)}: {cited} is outside the repository")
            elif not ((REPO / cited).is_file() or (where.parent / cited).resolve().is_file()):
                out.append(f"{where.relative_to(REPO)}: {cited} does not exist")
    return out


def _citing_files() -> Iterator[Path]:
    for folder in CITING:
        for p in sorted((REPO / folder).rglob("*")):
            # this file's own examples of bad citations are checked by test_citation_rule
            if p.suffix in (".py", ".js", ".md", ".html") and p.is_file() and p != THIS:
                yield p
    for p in sorted(REPO.glob("*.md")):
        yield p
    yield from sorted((REPO / "docs").glob("*.md"))


def test_every_cited_markdown_file_is_in_the_repository():
    problems = [b for p in _citing_files() for b in bad_citations(p.read_text("utf-8"), p)]
    assert problems == []
    # the references file tests and docstrings cite is there, with the sources they name
    refs = (REPO / "docs/references.md").read_text("utf-8")
    for source in ("Harris 1978", "Heinzel", "IEC 61260-1", "Randall and Antoni 2011",
                   "ISO 20816-1", "ISO 10816-3", "scipy.signal.welch", "Kaiser and Schafer"):
        assert source in refs, source


@pytest.mark.parametrize(("text", "found"), [
    ("# see docs/references.md", []),
    ("# see docs/refs-missing.md", ["tests/x.py: docs/refs-missing.md does not exist"]),
    ("# values in " + "../elsewhere/" + "NOTES.md",
     ["tests/x.py: ../elsewhere/NOTES.md is outside the repository"]),
    ("# values in " + "/srv/notes/" + "NOTES.md",
     ["tests/x.py: /srv/notes/NOTES.md is outside the repository"]),
    ("# (README.md, DEVELOPERS.md)", []),
    ("# README.md/DEVELOPERS.md", []),
    ("# README.md/NOTES.md", ["tests/x.py: NOTES.md does not exist"]),
    ("# https://example.org/a/b.md", []),
])
def test_citation_rule(text, found):
    assert bad_citations(text, REPO / "tests" / "x.py") == found
