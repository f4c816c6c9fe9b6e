"""Unit tests for :mod:`indb.options`: the one declaration of the fit options and what reads it.

The declaration (``OPTIONS``) must agree with every interface that spells the options out:
the Python signatures of ``indb.fit``, ``indb.deploy``, ``indb.dry_run`` and
``ModelSpec.build`` (kept explicit for IDEs), the fields of ``ModelSpec``, the keys of the
spec file's tables and the options of ``indb fit``. No numbers are computed here, so there is
no outside oracle; the contract checked is the project's own (one name per option across
Python, command line and TOML; issue 12).
"""

from __future__ import annotations

import dataclasses
import inspect
import re
from pathlib import Path

import click
import duckdb
import pytest
from click.testing import CliRunner

import indb
from indb import cli_options as CO
from indb import options as O
from indb.api import deploy, dry_run
from indb.cli import main
from indb.errors import SpecError
from indb.families import FAMILY_NAMES
from indb.links import LINK_NAMES
from indb.registry import DEFAULT_SCHEMA
from indb.spec import ModelSpec
from indb.specfile import TABLES

EMPTY = inspect.Parameter.empty


def _declared_default(option: O.Option) -> object:
    return EMPTY if option.default is O.REQUIRED else option.default


def _assert_signature(func: object, options: tuple[O.Option, ...]) -> None:
    params = inspect.signature(func).parameters  # type: ignore[arg-type]
    assert list(params) == [o.name for o in options]
    for option in options:
        p = params[option.name]
        assert p.default == _declared_default(option), option.name
        assert type(p.default) is type(_declared_default(option)), option.name
        positional = inspect.Parameter.POSITIONAL_OR_KEYWORD
        assert (p.kind is positional) == option.positional, option.name


def test_fit_signature_is_the_declaration():
    # names, order and defaults; the positional arguments first, the rest keyword-only
    positional = [o for o in O.OPTIONS if o.positional]
    keywords = [o for o in O.OPTIONS if not o.positional]
    params = list(inspect.signature(indb.fit).parameters)
    assert params[: len(positional)] == [o.name for o in positional]
    assert sorted(params) == sorted(o.name for o in O.OPTIONS)
    # fit lists db among the first keywords; the declaration keeps it with the engine's
    _assert_signature(indb.fit, tuple(O.OPTION[p] for p in params))
    kinds = {name: p.kind for name, p in inspect.signature(indb.fit).parameters.items()}
    assert all(kinds[o.name] is inspect.Parameter.KEYWORD_ONLY for o in keywords)


def test_model_spec_build_takes_the_model_options():
    _assert_signature(ModelSpec.build, O.group("model"))


def test_model_spec_field_defaults_are_the_declared_ones():
    # fields kept in the form the user gives them (no normalising) default as declared
    fields = {f.name: f.default for f in dataclasses.fields(ModelSpec)}
    scalar = [o for o in O.group("model") if isinstance(o.default, str | int | float)]
    assert {o.name for o in scalar} >= {"on_null", "tol", "max_iter", "compress", "intercept"}
    for option in scalar:
        if option.name in fields and not option.resolved:
            assert fields[option.name] == option.default, option.name


def test_deploy_and_dry_run_defaults_are_the_declared_ones():
    # deploy(result, name, ...) needs its name, so a parameter without a default is skipped
    for func in (deploy, dry_run):
        for name, p in inspect.signature(func).parameters.items():
            if name in O.OPTION and p.default is not EMPTY:
                assert p.default == _declared_default(O.OPTION[name]), (func.__name__, name)
    assert O.OPTION["registry_schema"].default == DEFAULT_SCHEMA


def test_spec_file_keys_are_the_python_names():
    # every key of [model], [deploy] and [engine] is a keyword of indb.fit under the same
    # name; the keywords left out are the ones a file does not declare, for the reasons given
    keys = [k for table in ("model", "deploy", "engine") for k in TABLES[table]]
    assert len(keys) == len(set(keys))
    per_call = {"start", "progress", "promote", "new_version"}
    assert set(keys) == set(inspect.signature(indb.fit).parameters) - per_call
    for table in ("model", "deploy", "engine"):
        assert all(O.OPTION[k].group == table for k in TABLES[table])
        assert {k: v for k, v in TABLES[table].items()} == {
            k: O.OPTION[k].kind for k in TABLES[table]
        }


# -- the command line -----------------------------------------------------------------


def _fit_params() -> list[click.Parameter]:
    command = main.commands["fit"]  # type: ignore[attr-defined]
    return list(command.params)


def test_every_cli_option_is_spelt_from_its_name():
    params = {p.name: p for p in _fit_params()}
    for option in O.OPTIONS:
        if not option.cli:
            assert option.name not in params or option.name == "source"
            continue
        param = params[option.name]
        assert not param.hidden
        stem = option.name.replace("_", "-")
        if option.kind is O.BOOLEAN:
            spelt = {True: [f"--no-{stem}"], False: [f"--{stem}"], None: [f"--{stem}"]}
            assert param.opts == spelt[option.default], option.name
        else:
            assert param.opts == [f"--{stem}"], option.name
            assert param.metavar == option.metavar
            assert param.multiple == (option.kind in CO._REPEATED)
        assert param.default in (None, ()), option.name  # the library keeps the defaults


def test_old_spellings_are_hidden_aliases():
    params = {opt: p for p in _fit_params() for opt in (*p.opts, *p.secondary_opts)}
    old = {"--only": "predictors", "--nulls": "on_null", "--interact": "interactions"}
    old |= {"--spline": "splines", "--hold": "promote"}
    assert {a: o.name for o in O.OPTIONS for a in o.aliases} == old
    text = CliRunner().invoke(main, ["fit", "--help"], terminal_width=200).stdout
    for alias, name in old.items():
        assert params[alias].hidden
        assert f"{alias} " not in text and f"{alias}," not in text
        assert O.OPTION[name].flag in text or f"--no-{name}" in text


def test_help_lists_the_allowed_values_and_defaults():
    text = CliRunner().invoke(main, ["fit", "--help"], terminal_width=400).stdout
    lines = {line.split()[0]: line for line in text.splitlines() if line.strip().startswith("--")}
    assert all(name in lines["--family"] for name in FAMILY_NAMES)
    assert all(name in lines["--link"] for name in LINK_NAMES)
    assert "exclude, error" in lines["--on-null"] and "[default: exclude]" in lines["--on-null"]
    assert "auto, always, never" in lines["--compress"]
    assert "[default: 50]" in lines["--max-iter"]


def test_given_arguments_pass_only_what_was_typed():
    options = CO.on_cli("model")
    values = {sp.dest: None for o in options for sp in CO.spellings(o)}
    values |= {sp.dest: () for o in options for sp in CO.spellings(o) if o.kind in CO._REPEATED}
    assert CO.given_arguments(values, options) == {}
    values |= {"predictors": ("a",), "predictors__only": ("b",), "intercept": False}
    values |= {"splines__spline": ("age=4",), "on_null": "error", "on_null__nulls": "error"}
    assert CO.given_arguments(values, options) == {
        "intercept": False,
        "predictors": ["a", "b"],
        "splines": {"age": 4},
        "on_null": "error",
    }
    values["on_null__nulls"] = "exclude"
    with pytest.raises(SpecError, match=r"--on-null and --nulls are one option \(--on-null\)"):
        CO.given_arguments(values, options)


# -- the checks the declaration drives -------------------------------------------------


@pytest.mark.parametrize(
    ("option", "value", "message"),
    [
        ("compress", "sometimes", "compress must be 'auto', 'always' or 'never'; got 'sometimes'"),
        ("on_null", "drop", "on_null must be 'exclude' or 'error'; got 'drop'"),
        ("sample_start", True, "sample_start must be 'auto', 'always' or 'never'; got True"),
    ],
)
def test_model_spec_build_refuses_values_not_declared(option: str, value: object, message: str):
    with pytest.raises(SpecError) as err:
        ModelSpec.build("t", "y", **{option: value})
    assert str(err.value) == message


@pytest.mark.parametrize(
    ("option", "value", "expected"),
    [
        ("promote", "no", "true or false"),
        ("new_version", 1, "true or false"),
        ("progress", "print", "a function taking one iteration record"),
        ("db", 7, "text (a quoted string)"),
        ("predictors", "age", O.NAMES.expected),
    ],
)
def test_fit_refuses_a_value_of_the_wrong_kind_before_any_work(
    option: str, value: object, expected: str
):
    with pytest.raises(SpecError, match=rf"^{option} must be {re.escape(expected)}, got "):
        indb.fit("t", "y", **{option: value})


def test_a_connection_or_a_path_is_a_database(tmp_path: Path):
    # DuckDB's own connection object and a pathlib path pass the db check, as before it
    path = tmp_path / "line.duckdb"
    with duckdb.connect(str(path)) as con:
        con.execute("CREATE TABLE t AS SELECT range::DOUBLE AS x, 2 * range + 1 AS y FROM range(5)")
    with duckdb.connect(str(path)) as con:
        fits = [indb.fit("t", "y", db=con), indb.fit("t", "y", db=path)]
    for result in fits:
        # y = 1 + 2 x exactly: the least-squares line through the points (no oracle needed)
        assert [round(c.estimate, 9) for c in result.coefficients] == [1.0, 2.0]
