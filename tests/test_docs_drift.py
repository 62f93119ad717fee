"""The docs cannot drift from the code.

Every ``maskrun VERB`` and every ``--option`` written in README.md, DEVELOPERS.md and docs/*.md must exist in
the real command-line parser (built by the function the ``maskrun`` entry point uses, its sub-commands walked,
not ``--help`` text), and every config key the docs name, as ``[table] key`` in code or inside a TOML code
block, must exist in the config models (the bench config tables and, under ``[camera.settings]``,
``[modulator.settings]`` and ``[safety.settings]``, the settings model of the driver the block names, or of
some installed driver of that kind when it names none). Values in TOML blocks are validated by the same models
(keys left out are not a problem: blocks are excerpts). docs/configs.md must list every key of every table.

A self-check feeds the checker made-up names and requires it to report each one, so the test can fail.
"""

from __future__ import annotations

import argparse
import importlib
import re
import tomllib
import typing
from dataclasses import dataclass, field
from importlib.metadata import entry_points
from pathlib import Path

import pytest
from pydantic import BaseModel, ValidationError

from maskrun.daemon import config as config_models
from maskrun.drivers.registry import installed_drivers

ROOT = Path(__file__).resolve().parents[1]
DOC_FILES = [ROOT / "README.md", ROOT / "DEVELOPERS.md", *sorted((ROOT / "docs").glob("*.md"))]


# ----------------------------------------------------------------------------- the real CLI
def build_cli_parser() -> argparse.ArgumentParser:
    """The parser of the installed ``maskrun`` command: the module its entry point names, its build_parser."""
    (ep,) = [e for e in entry_points(group="console_scripts") if e.name == "maskrun"]
    module = importlib.import_module(ep.value.split(":")[0])
    return module.build_parser()


def cli_options(parser: argparse.ArgumentParser) -> dict[str, set[str]]:
    """verb -> its long options ('' holds the top-level ones)."""
    out = {"": {o for a in parser._actions for o in a.option_strings if o.startswith("--")}}
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for verb, sub in action.choices.items():
                out[verb] = {o for a in sub._actions for o in a.option_strings if o.startswith("--")}
    return out


# ----------------------------------------------------------------------------- the config models
SETTINGS_KINDS = {"camera": "camera", "modulator": "modulator", "safety": "safety"}


def _models_in(annotation) -> list[type[BaseModel]]:
    """Pydantic models inside an annotation (X, X | None, dict[K, X])."""
    if isinstance(annotation, type) and issubclass(annotation, BaseModel):
        return [annotation]
    found = []
    for arg in typing.get_args(annotation):
        found += _models_in(arg)
    return found


def _dict_keys(annotation) -> set[str] | None:
    """Allowed keys of a dict[Literal[...], X] field, None when it is not such a dict."""
    if typing.get_origin(annotation) is dict:
        key_type = typing.get_args(annotation)[0]
        if typing.get_origin(key_type) is typing.Literal:
            return set(typing.get_args(key_type))
    return None


def driver_settings(kind: str) -> dict[str, type[BaseModel]]:
    return {name: cls.Settings for name, cls in installed_drivers(kind).items()}


@dataclass
class Problem:
    where: str
    what: str

    def __str__(self) -> str:
        return f"{self.where}: {self.what}"


@dataclass
class Checker:
    options: dict[str, set[str]]
    settings: dict[str, dict[str, type[BaseModel]]] = field(default_factory=dict)

    # ------------------------------------------------------------------ commands
    def check_command_text(self, text: str, where: str, problems: list[Problem]) -> None:
        """One code span or one code-block line: every 'maskrun VERB [--opt ...]' in it."""
        matches = list(re.finditer(r"(?:(?<=^)|(?<=[\s`$('\"]))maskrun[ \t]+([a-z][a-z0-9-]*)", text))
        for i, m in enumerate(matches):
            verb = m.group(1)
            end = matches[i + 1].start() if i + 1 < len(matches) else len(text)
            args = text[m.end():end]
            before = text[m.start() - 1] if m.start() else ""
            if before in "'\"" and before:
                args = args.split(before, 1)[0]
            args = re.split(r"\s#|&&|;|\s>\s", args, maxsplit=1)[0]
            if verb not in self.options:
                problems.append(Problem(where, f"'maskrun {verb}': no such verb"))
                continue
            for opt in re.findall(r"(?<![\w-])(--[a-z][a-z0-9-]*)", args):
                if opt not in self.options[verb] and opt not in self.options[""]:
                    problems.append(Problem(where, f"'maskrun {verb} {opt}': no such option of '{verb}'"))
            # 'maskrun pause | resume | stop': the words after a spaced bar (outside brackets) are verbs too
            depth, pos = 0, 0
            for j, ch in enumerate(args):
                depth += ch in "[" and 1 or (ch == "]" and -1 or 0)
                if ch == "|" and depth == 0 and args[j - 1:j] == " ":
                    w = re.match(r"\s*([a-z][a-z0-9-]*)\s*(?:\||$)", args[j + 1:])
                    if w and w.group(1) not in self.options:
                        problems.append(Problem(where, f"'maskrun ... | {w.group(1)}': no such verb"))

    def check_lone_option(self, span: str, where: str, problems: list[Problem]) -> None:
        """A code span that is just an option ('--setting KEY=VALUE'): some verb must have it."""
        m = re.match(r"(--[a-z][a-z0-9-]*)", span)
        if m and not any(m.group(1) in opts for opts in self.options.values()):
            problems.append(Problem(where, f"'{m.group(1)}': no verb of maskrun has this option"))

    # ------------------------------------------------------------------ config keys
    def _table_model(self, path: list[str]):
        """The model (or ('settings', kind)) of a dotted table path, or None."""
        model: type[BaseModel] | None = config_models.BenchConfig
        for k, part in enumerate(path):
            if model is None:
                return None
            if part == "settings" and k == 1 and path[0] in SETTINGS_KINDS:
                return ("settings", SETTINGS_KINDS[path[0]], path[2:])
            f = model.model_fields.get(part)
            if f is None:
                return None
            keys = _dict_keys(f.annotation)
            inner = _models_in(f.annotation)
            if keys is not None:  # dict[Literal, Model]: the next part is a key of the dict
                if k + 1 < len(path):
                    if path[k + 1] not in keys:
                        return None
                    rest = path[k + 2:]
                    sub = self._table_model_from(inner[0], rest)
                    return sub
                return ("dictkeys", keys)
            model = inner[0] if inner else None
            if model is None and k + 1 <= len(path) - 1:
                return None
        return model

    def _table_model_from(self, model, rest):
        for part in rest:
            f = model.model_fields.get(part)
            inner = _models_in(f.annotation) if f else []
            if not inner:
                return None
            model = inner[0]
        return model

    def _settings_models(self, kind: str, driver: str | None, sub: list[str]):
        models = self.settings.get(kind, {})
        chosen = [models[driver]] if driver in models else list(models.values())
        out = []
        for m in chosen:
            m = self._table_model_from(m, sub)
            if m is not None:
                out.append(m)
        return out

    def check_table_key(self, table: str, keys: list[str], where: str, problems: list[Problem],
                        driver: str | None = None) -> None:
        path = table.split(".")
        target = self._table_model(path)
        if target is None:
            problems.append(Problem(where, f"'[{table}]': no such config table"))
            return
        for key in keys:
            if isinstance(target, tuple) and target[0] == "dictkeys":
                ok = key in target[1]
            elif isinstance(target, tuple):
                ok = any(key in m.model_fields for m in self._settings_models(target[1], driver, target[2]))
            else:
                ok = key in target.model_fields
            if not ok:
                named = f" of driver '{driver}'" if driver and isinstance(target, tuple) else ""
                problems.append(Problem(where, f"'[{table}] {key}': no such config key{named}"))

    def check_toml_block(self, text: str, where: str, problems: list[Problem]) -> None:
        # commented-out settings ('# max_dose_photons = 1e12') are keys the reader may switch on: check them too
        text = re.sub(r"(?m)^(\s*)#\s*([a-z_][a-z0-9_]*\s*=)", r"\1\2", text)
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            problems.append(Problem(where, f"TOML block does not parse: {exc}"))
            return
        if {"project", "tool", "build-system"} & set(data):
            return  # a package's pyproject.toml, not a bench config
        self._walk(data, [], where, problems, driver=None)

    def _walk(self, table: dict, path: list[str], where: str, problems: list[Problem], driver) -> None:
        if len(path) == 1 and path[0] in SETTINGS_KINDS:
            driver = table.get("driver")
        scalars = [k for k, v in table.items() if not isinstance(v, dict)]
        if path:
            self.check_table_key(".".join(path), scalars + [k for k, v in table.items() if isinstance(v, dict)],
                                 where, problems, driver)
            self._validate_values(path, table, where, problems, driver)
        else:
            for k in scalars:
                problems.append(Problem(where, f"'{k}': a key outside any table"))
        for k, v in table.items():
            if isinstance(v, dict):
                sub = path + [k]
                if not path and k not in config_models.BenchConfig.model_fields:
                    problems.append(Problem(where, f"'[{k}]': no such config table"))
                    continue
                self._walk(v, sub, where, problems, driver)

    def _validate_values(self, path, table, where, problems, driver) -> None:
        target = self._table_model(path)
        if isinstance(target, tuple):
            if target[0] != "settings" or driver not in self.settings.get(target[1], {}):
                return
            models = self._settings_models(target[1], driver, target[2])
        elif target is None:
            return
        else:
            models = [target]
        for model in models:
            try:
                model.model_validate(table)
            except ValidationError as exc:
                for e in exc.errors():
                    loc = ".".join(str(x) for x in e["loc"])
                    if e["type"] in ("missing", "extra_forbidden") or (loc.split(".")[0] in table and
                                                                       isinstance(table[loc.split(".")[0]], dict)):
                        continue  # missing keys: an excerpt; unknown keys and sub-tables: reported by key
                    if e["type"] == "value_error" and "give " in e["msg"]:
                        continue  # a combination rule needing a key the excerpt leaves out
                    problems.append(Problem(where, f"'[{'.'.join(path)}] {loc}': {e['msg']}"))

    # ------------------------------------------------------------------ one document
    def check_document(self, text: str, name: str) -> list[Problem]:
        problems: list[Problem] = []
        lines = text.splitlines()
        prose: list[tuple[int, str]] = []
        i = 0
        while i < len(lines):
            fence = re.match(r"^\s*```(\w*)", lines[i])
            if fence:
                lang, start, block = fence.group(1), i + 1, []
                i += 1
                while i < len(lines) and not re.match(r"^\s*```", lines[i]):
                    block.append(lines[i])
                    i += 1
                i += 1
                if lang == "toml":
                    self.check_toml_block("\n".join(block), f"{name}:{start}", problems)
                elif lang not in ("python", "py"):
                    joined = "\n".join(block).replace("\\\n", " ")
                    for n, line in enumerate(joined.splitlines()):
                        self.check_command_text(line, f"{name}:{start + n + 1}", problems)
                continue
            prose.append((i + 1, lines[i]))
            i += 1
        # code spans may wrap over a line break: join the prose, keep a map back to line numbers
        joined, starts = "", []
        for number, line in prose:
            starts.append((len(joined), number))
            joined += line + "\n"

        def line_of(pos: int) -> str:
            number = 0
            for offset, n in starts:
                if offset > pos:
                    break
                number = n
            return f"{name}:{number}"

        spans = [(m.start(), m.group(1).replace("\n", " ")) for m in re.finditer(r"`([^`]+)`", joined)]
        for k, (pos, span) in enumerate(spans):
            where = line_of(pos)
            self.check_command_text(span, where, problems)
            if span.startswith("--"):
                self.check_lone_option(span, where, problems)
            t = re.match(r"\[([a-z][a-z0-9_]*(?:\.[a-z][a-z0-9_]*)*)\](.*)$", span)
            if t:
                table, rest = t.group(1), t.group(2)
                keys = re.match(r"\s+([a-z_][a-z0-9_]*(?:/[a-z_][a-z0-9_]*)*)", rest)
                if keys:
                    self.check_table_key(table, keys.group(1).split("/"), where, problems)
                else:  # '`[service]` `key`': a table span followed by a key span
                    after = joined[pos + len(span) + 2:]
                    nxt = re.match(r"[ \n]`([a-z_][a-z0-9_]*)`", after)
                    if nxt and nxt.group(1) not in ("table", "tables"):
                        self.check_table_key(table, [nxt.group(1)], where, problems)
                    else:
                        self.check_table_key(table, [], where, problems)
        return problems


@pytest.fixture(scope="module")
def checker() -> Checker:
    return Checker(cli_options(build_cli_parser()), {k: driver_settings(k) for k in SETTINGS_KINDS.values()})


def test_the_checker_reports_names_that_do_not_exist(checker):
    """Self-check: made-up verbs, options, tables, keys, driver settings and values are all reported;
    real ones are not."""
    made_up = """
Run `maskrun frobnicate now`, or `maskrun run bench.toml --no-such-option`, then `--made-up-flag`.
Set `[run] no_such_key` and `[nowhere] passes`; `[service]` `made_up_address` too.

```
maskrun serve configs/demo.toml --control tcp://127.0.0.1:1 --bogus-option 3
maskrun pause | frobnicate
```

```toml
[checks]
made_up_limit = 1
max_saturated_fraction = "many"

[camera]
driver = "simulated"

[camera.settings]
bit_depth = 12
no_such_setting = 3

[simulation.firmware.modulator]
settle_s = 0.1
bogus = 1
```
"""
    found = [str(p) for p in checker.check_document(made_up, "made-up.md")]
    expected = ["'maskrun frobnicate'", "'maskrun run --no-such-option'", "'--made-up-flag'",
                "'[run] no_such_key'", "'[nowhere]'", "'[service] made_up_address'",
                "'maskrun serve --bogus-option'", "| frobnicate'", "'[checks] made_up_limit'",
                "'[checks] max_saturated_fraction'", "'[camera.settings] no_such_setting'",
                "'[simulation.firmware.modulator] bogus'"]
    for name in expected:
        assert any(name in line for line in found), f"the checker missed {name}; it found: {found}"
    assert len(found) == len(expected), found

    real = """
`maskrun run CONFIG --passes 3 --acknowledge-safety`, `maskrun pause | resume | stop | status`,
`[run] flush_interval_s`, `[safety.settings] watchdog_s`, `[service]` `publish_address`, `--setting KEY=VALUE`.

```toml
[camera]
driver = "replay"

[camera.settings]
path = "runs/x.h5"
include_darks = true
```
"""
    assert checker.check_document(real, "real.md") == []


@pytest.mark.parametrize("doc", DOC_FILES, ids=lambda p: str(p.relative_to(ROOT)))
def test_every_command_option_and_config_key_in_the_docs_exists(checker, doc):
    problems = checker.check_document(doc.read_text(encoding="utf-8"), str(doc.relative_to(ROOT)))
    assert not problems, "the docs name things the code does not have (fix the doc, or the code):\n" + "\n".join(
        map(str, problems))


def _model_keys(model: type[BaseModel], prefix: str) -> dict[str, set[str]]:
    """table -> keys, for the bench config and the tables nested in it (driver settings excluded)."""
    out = {prefix: set(model.model_fields)} if prefix else {}
    for name, f in model.model_fields.items():
        keys = _dict_keys(f.annotation)
        for inner in _models_in(f.annotation):
            sub = f"{prefix}.{name}" if prefix else name
            if keys is not None:
                for k in sorted(keys):
                    out |= _model_keys(inner, f"{sub}.{k}")
            else:
                out |= _model_keys(inner, sub)
    return out


def test_configs_doc_lists_every_table_and_key():
    """docs/configs.md has a '### `[table]`' heading per table and a '| `key` |' row per key."""
    text = (ROOT / "docs" / "configs.md").read_text(encoding="utf-8")
    documented: dict[str, set[str]] = {}
    table = None
    for line in text.splitlines():
        h = re.match(r"^###\s+`\[([a-zA-Z0-9_.]+)\]`", line)
        if h:
            table = h.group(1)
            documented.setdefault(table, set())
        elif table and (row := re.match(r"^\|\s*`([a-z_][a-z0-9_]*)`\s*\|", line)):
            documented[table].add(row.group(1))
    missing = []
    for table, keys in _model_keys(config_models.BenchConfig, "").items():
        if table.startswith("simulation.firmware."):
            table = "simulation.firmware.KIND"
        for key in sorted(keys - documented.get(table, set())):
            missing.append(f"[{table}] {key}")
    assert not missing, "docs/configs.md does not describe: " + ", ".join(sorted(set(missing)))


def test_python_imports_in_the_docs_resolve():
    """Every 'from maskrun... import NAME' in a python block of the docs imports."""
    problems = []
    for doc in DOC_FILES:
        text = doc.read_text(encoding="utf-8")
        for block in re.findall(r"```python\n(.*?)```", text, flags=re.S):
            for mod, names in re.findall(r"^\s*from (maskrun[\w.]*) import ([\w, ]+)", block, flags=re.M):
                try:
                    module = importlib.import_module(mod)
                except ImportError as exc:
                    problems.append(f"{doc.name}: from {mod}: {exc}")
                    continue
                for n in (x.strip() for x in names.split(",")):
                    if n and not hasattr(module, n):
                        problems.append(f"{doc.name}: {mod} has no {n}")
    assert not problems, "\n".join(problems)


def test_links_between_the_docs_point_at_files_that_exist():
    """Every relative markdown link in README.md, DEVELOPERS.md and docs/ names a file of the repository."""
    broken = []
    for doc in DOC_FILES:
        for target in re.findall(r"\]\(([^)#\s]+)(?:#[^)]*)?\)", doc.read_text(encoding="utf-8")):
            if "://" in target or target.startswith("mailto:"):
                continue
            if not (doc.parent / target).exists():
                broken.append(f"{doc.relative_to(ROOT)}: {target}")
    assert not broken, "links to files that do not exist:\n" + "\n".join(broken)
