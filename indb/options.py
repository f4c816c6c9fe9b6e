"""The fit options, declared once: one :class:`Option` per option, with the :class:`Kind` of
value it takes.

``OPTIONS`` is the one list of the options of :func:`indb.fit`: name, kind, default, help,
allowed values, and the group it belongs to, which is also the table of a spec file that
holds it (``model``, ``deploy``, ``engine``; ``run`` for the progress callback, which only
Python has). Everything else reads it: ``indb.fit`` and ``indb.dry_run`` check their
arguments against the kinds, ``ModelSpec.build`` checks the choices, ``indb.specfile`` takes
each table's keys from it, and the command line generates its options from it
(``indb.cli_options``), spelt as the name with ``-`` for ``_`` (``on_null`` is
``--on-null``). A test holds the Python signatures of ``indb.fit`` and ``ModelSpec.build`` to
the list, names and defaults.

:func:`check_options` checks given values against the kinds before any work starts. A spec
file reaches the same declarations with its file and table named (``indb.specfile``), so a
TOML value of the wrong type is refused with the key, the expected type and the value seen,
instead of failing deep inside a fit or being taken for something else (``"no"`` is not
false). The fields of ``indb.specfile.Gates`` declare their kinds the same way.

Range checks (``tol`` in (0, 1), ``max_iter`` >= 1) stay where the value is used
(``indb.spec.ModelSpec.build``); a kind only says what shape a value has.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from indb.errors import SpecError
from indb.families import FAMILY_NAMES
from indb.kinds import (  # noqa: F401  (re-exported: the options' kinds are read from here too)
    BOOLEAN,
    CALLBACK,
    COLUMN_GROUPS,
    DATABASE,
    KNOTS,
    LEVELS,
    NAMES,
    NUMBER,
    TABLE,
    TEXT,
    VALUES,
    WHOLE,
    Kind,
    check_options,
    toml_text,
)
from indb.links import LINK_NAMES

# -- the options ------------------------------------------------------------------------


class _Required:
    def __repr__(self) -> str:
        return "REQUIRED"


#: The default of an option that must be given (``source`` and ``response``).
REQUIRED: Any = _Required()

#: Largest max_levels accepted, the largest size measured (benchmarks/RESULTS.md, "Many
#: levels"): one categorical column costs the fit memory and time in proportion to its
#: levels (indb.normal_eq), but write-back and the scoring view's CASE of one branch per
#: level grow with them too. Every other categorical column counts towards the dense part,
#: capped by indb.normal_eq.MAX_REST_COLUMNS. ``ModelSpec.build`` checks the range.
MAX_LEVELS_LIMIT = 50_000

#: The covariance kinds of the ``covariance`` option (see :mod:`indb.sandwich`).
COVARIANCE_KINDS = ("model", "robust", "cluster")
CV_RULES = ("one_se", "min")

#: The groups of options; the first three are also the tables of a spec file. ``explore``
#: holds the options only ``indb explore`` has (:data:`EXPLORE_OPTIONS`), outside ``OPTIONS``.
GROUPS = ("model", "deploy", "engine", "run", "explore")


@dataclass(frozen=True)
class Option:
    """One option of :func:`indb.fit`, as every interface to it sees it.

    Parameters
    ----------
    name:
        The Python keyword and spec-file key; the command line spells it with ``-`` for
        ``_`` (:attr:`flag`).
    kind:
        The shape of value it takes (checked by :func:`check_options`).
    default:
        The library's default (:data:`REQUIRED` when it has none). The command line passes
        on only the options given, so this stays the one default.
    help:
        One or two sentences for ``--help``; :meth:`help_text` adds the allowed values and
        the default.
    group:
        ``model`` (what to fit: ``ModelSpec.build``), ``deploy`` (writing the model back),
        ``engine`` (the database and its settings) or ``run`` (Python only).
    choices:
        The allowed values of an enumerated option, listed by :meth:`help_text`.
        ``ModelSpec.build`` refuses any other value, unless ``resolved`` is set.
    resolved:
        The value is a name that ``make_family`` / ``make_link`` resolve, forgiving case
        and a few alternative spellings, with messages of their own; ``choices`` then lists
        the names without being checked here.
    metavar:
        How ``--help`` shows the value (``COL``, ``EXPR``).
    positional:
        A positional argument of :func:`indb.fit` and ``ModelSpec.build``.
    cli, in_file:
        Whether the option has a command-line form / is a key of its group's table in a
        spec file. Start values, for example, have neither: a retrain takes them from the
        live version.
    cli_required:
        The command line asks for it although Python has a default (``--family``: a fit
        from the shell names its family).
    minimum:
        The smallest whole number the command line takes.
    aliases:
        Former command-line spellings, still accepted but not shown in ``--help``, for one
        release (``--only`` for ``--predictors``).
    alias_value:
        For a boolean, the value its former spellings set (None: the opposite of the
        default; ``--hold`` sets ``promote`` False where the default is None).
    """

    name: str
    kind: Kind
    default: Any
    help: str
    group: str
    choices: tuple[str, ...] = ()
    resolved: bool = False
    metavar: str | None = None
    positional: bool = False
    cli: bool = True
    in_file: bool = True
    cli_required: bool = False
    minimum: int | None = None
    aliases: tuple[str, ...] = ()
    alias_value: Any = None

    def __post_init__(self) -> None:
        if self.group not in GROUPS:
            raise ValueError(f"option {self.name}: group {self.group!r} not in {GROUPS}")

    @property
    def flag(self) -> str:
        """The command-line spelling: ``on_null`` -> ``--on-null``."""
        return "--" + self.name.replace("_", "-")

    @property
    def required(self) -> bool:
        return self.default is REQUIRED

    def help_text(self) -> str:
        """:attr:`help` with the allowed values and the library's default appended."""
        text = self.help
        if self.choices:
            text += f" One of: {', '.join(self.choices)}."
        shown = self.default not in (None, REQUIRED, (), True, False)
        if shown and not self.cli_required:
            text += f"  [default: {self.default}]"
        return text


def _with(help: str) -> str:
    return f"With --name: {help}"


OPTIONS: tuple[Option, ...] = (
    # -- model: what to fit ([model] in a spec file; ModelSpec.build) ---------------------
    Option(
        "source",
        TEXT,
        REQUIRED,
        "The rows: a table or view name, a SELECT query, or a Parquet/CSV path (globs allowed).",
        "model",
        positional=True,
        cli=False,  # the SOURCE argument of `indb fit`
    ),
    Option("response", TEXT, REQUIRED, "Response column.", "model", metavar="COL", positional=True),
    Option(
        "family",
        TEXT,
        "gaussian",
        "Distribution family of the response.",
        "model",
        choices=FAMILY_NAMES,
        resolved=True,
        metavar="F",
        positional=True,
        cli_required=True,
    ),
    Option(
        "link",
        TEXT,
        None,
        "Link function (default: the family's canonical link).",
        "model",
        choices=LINK_NAMES,
        resolved=True,
        metavar="L",
        positional=True,
    ),
    Option(
        "trials", TEXT, None, "Binomial trials per row (SQL expression).", "model", metavar="EXPR"
    ),
    Option("offset", TEXT, None, "Offset, e.g. 'ln(exposure)'.", "model", metavar="EXPR"),
    Option("weight", TEXT, None, "Prior (variance) weight.", "model", metavar="EXPR"),
    Option(
        "frequency_weight", TEXT, None, "Each row counts this many times.", "model", metavar="EXPR"
    ),
    Option("power", NUMBER, None, "Tweedie variance power.", "model", metavar="P"),
    Option(
        "theta",
        NUMBER,
        None,
        "Negative binomial theta; leave out to estimate it.",
        "model",
        metavar="T",
    ),
    Option("link_power", NUMBER, None, "Exponent for --link power.", "model", metavar="X"),
    Option("intercept", BOOLEAN, True, "Fit without an intercept term.", "model"),
    Option(
        "predictors",
        NAMES,
        None,
        "Use only these predictor columns (repeatable).",
        "model",
        metavar="COL",
        aliases=("--only",),
    ),
    Option(
        "exclude",
        NAMES,
        (),
        "Leave this column out of the predictors (repeatable).",
        "model",
        metavar="COL",
    ),
    Option(
        "categorical",
        NAMES,
        (),
        "Treat this numeric column as categorical (repeatable).",
        "model",
        metavar="COL",
    ),
    Option(
        "reference",
        LEVELS,
        None,
        "Reference level of a categorical column (repeatable).",
        "model",
        metavar="COL=LEVEL",
    ),
    Option(
        "interactions",
        COLUMN_GROUPS,
        (),
        "Add the interaction of these comma-separated columns (repeatable).",
        "model",
        metavar="A,B",
        aliases=("--interact",),
    ),
    Option(
        "splines",
        KNOTS,
        None,
        "Restricted cubic spline of COL with KNOTS knots (repeatable).",
        "model",
        metavar="COL=KNOTS",
        aliases=("--spline",),
    ),
    Option(
        "on_null",
        TEXT,
        "exclude",
        "Rows with NULL in a model column: set them aside or stop.",
        "model",
        choices=("exclude", "error"),
        metavar="ACTION",
        aliases=("--nulls",),
    ),
    Option("tol", NUMBER, 1e-8, "Relative deviance change that ends IRLS.", "model", metavar="TOL"),
    Option("max_iter", WHOLE, 50, "Iteration cap.", "model", metavar="N"),
    Option(
        "strict",
        BOOLEAN,
        False,
        "Fail (exit 5) instead of warning when IRLS does not settle.",
        "model",
    ),
    Option(
        "max_levels",
        WHOLE,
        10_000,
        f"Most levels a categorical column may have (at most {MAX_LEVELS_LIMIT:,}).",
        "model",
        metavar="N",
    ),
    Option(
        "confidence", NUMBER, 0.95, "Confidence level of the intervals.", "model", metavar="LEVEL"
    ),
    Option(
        "start",
        VALUES,
        None,
        "Starting coefficients by term name (on the original scale).",
        "model",
        cli=False,
        in_file=False,  # a retrain starts from the live version
    ),
    Option(
        "compress",
        TEXT,
        "auto",
        "Fold the source to its distinct design rows before IRLS.",
        "model",
        choices=("auto", "always", "never"),
        metavar="WHEN",
    ),
    Option(
        "sample_start",
        TEXT,
        "auto",
        "Start IRLS from a fit on a hashed sample of about 100,000 rows (auto: tables of "
        "2,000,000 rows or more).",
        "model",
        choices=("auto", "always", "never"),
        metavar="WHEN",
    ),
    Option(
        "covariance",
        TEXT,
        "model",
        "Where the standard errors come from: the model's information (model), a sandwich "
        "of the rows' scores with no small-sample factor (robust), or scores summed within "
        "each --cluster value first (cluster).",
        "model",
        choices=COVARIANCE_KINDS,
        metavar="KIND",
    ),
    Option(
        "cluster",
        TEXT,
        None,
        "With --covariance cluster: the rows' cluster, a SQL expression, e.g. 'policy_id'.",
        "model",
        metavar="EXPR",
    ),
    # -- the elastic net (indb.penalty) --------------------------------------------------------
    Option(
        "penalty",
        NUMBER,
        None,
        "Elastic-net strength lambda: minimise deviance / (2 x weight total) + lambda x "
        "[a sum|b| + (1-a)/2 sum b^2]; the intercept is never penalised. Penalised estimates "
        "carry no standard errors.",
        "model",
        metavar="LAMBDA",
    ),
    Option(
        "l1_share",
        NUMBER,
        0.0,
        "Share a of the L1 part of the penalty: 0 ridge, 1 lasso.",
        "model",
        metavar="A",
    ),
    Option(
        "standardize",
        BOOLEAN,
        False,
        "Penalise coefficients of columns scaled to weighted standard deviation 1 (estimates "
        "stay on the original scale).",
        "model",
    ),
    Option(
        "penalty_for",
        VALUES,
        None,
        "Multiply the penalty of a column's coefficients by FACTOR (0: unpenalised) (repeatable).",
        "model",
        metavar="COL=FACTOR",
    ),
    Option(
        "path",
        WHOLE,
        None,
        "Fit N values of lambda from lambda_max (all penalised coefficients 0) down to "
        "path_ratio x lambda_max, each started from the previous; the result is the last.",
        "model",
        metavar="N",
        minimum=2,
    ),
    Option(
        "path_ratio",
        NUMBER,
        1e-3,
        "Smallest lambda of --path as a share of lambda_max.",
        "model",
        metavar="R",
    ),
    Option(
        "drop_one",
        BOOLEAN,
        False,
        "Also test each model term by the likelihood ratio: fit the model without it (all "
        "such models in shared scans, one read per iteration) and report the deviance "
        "change and its chi-square or F p-value next to the Wald test.",
        "model",
    ),
    # -- k-fold cross-validation of the path (indb.crossval) ------------------------------------
    Option(
        "folds",
        WHOLE,
        None,
        "Cross-validate the --path over K folds: each fold's path is fitted on the other rows "
        "and scored by its deviance on the fold; the model is refitted at the chosen lambda.",
        "model",
        metavar="K",
    ),
    Option(
        "fold_by",
        TEXT,
        None,
        "With --folds: a per-row integer SQL expression; a row's fold is "
        "((EXPR % K) + K) % K, e.g. 'policy_id'.",
        "model",
        metavar="EXPR",
    ),
    Option(
        "cv_rule",
        TEXT,
        "one_se",
        "Which lambda the cross-validation chooses: the largest within one standard error of "
        "the least mean deviance (one_se), or the least mean deviance (min).",
        "model",
        choices=CV_RULES,
        metavar="RULE",
    ),
    # -- run: Python only --------------------------------------------------------------------
    Option(
        "progress",
        CALLBACK,
        None,
        "Called with each scan's IterationRecord as the fit runs: the pre-fit scans (phase "
        "'prepare', no deviance yet), then every IRLS scan (as in the iteration log).",
        "run",
        cli=False,  # the command line has --progress-json and its text lines
        in_file=False,
    ),
    # -- deploy: writing the model back ([deploy]) -------------------------------------------
    Option(
        "name",
        TEXT,
        None,
        "Write the model back into --db: a new registry version, the scoring view NAME and "
        "the scoring macro NAME_score.",
        "deploy",
        metavar="NAME",
    ),
    Option(
        "promote",
        BOOLEAN,
        None,
        _with(
            "make the version live (--promote) or only record it (--no-promote). Left out, "
            "a first version, or a refit with the live version's spec, goes live; a "
            "version whose spec differs from the live one's is recorded held until promoted."
        ),
        "deploy",
        in_file=False,  # a retrain promotes by its gates
        aliases=("--hold",),
        alias_value=False,
    ),
    Option(
        "new_version",
        BOOLEAN,
        False,
        _with("record a new version even when spec and data are unchanged."),
        "deploy",
        in_file=False,
    ),
    Option(
        "view_schema",
        TEXT,
        None,
        _with("schema for the scoring view and macro (default: the main schema)."),
        "deploy",
        metavar="S",
    ),
    Option(
        "score_source",
        TEXT,
        None,
        _with(
            "table, query or file the scoring view reads instead of SOURCE; it needs the "
            "model's input columns."
        ),
        "deploy",
        metavar="SRC",
    ),
    Option(
        "intervals",
        BOOLEAN,
        None,
        _with(
            "add the standard error of eta and a confidence interval for the mean to the "
            "scoring view."
        ),
        "deploy",
    ),
    Option(
        "diagnostics",
        BOOLEAN,
        None,
        _with(
            "also write the view NAME_diagnostics over the training source: fitted values, "
            "response, Pearson, deviance and working residuals, leverage and Cook's distance "
            "per row."
        ),
        "deploy",
    ),
    Option(
        "registry_schema",
        TEXT,
        "indb_registry",  # indb.registry.DEFAULT_SCHEMA (a test holds them together)
        "Schema holding the model registry.",
        "deploy",
        metavar="S",
    ),
    # -- engine: the database and its settings ([engine]; connect) -------------------------
    Option(
        "db",
        DATABASE,
        None,
        "DuckDB database file, or postgresql://..., spark:local[N], sc://host:port. Leave "
        "out to work in a fresh in-memory DuckDB database. A DuckDB file is opened read-only "
        "unless --name writes to it.",
        "engine",
        metavar="DB",
    ),
    Option(
        "memory_limit",
        TEXT,
        None,
        "DuckDB memory limit, e.g. 4GB; work beyond it spills to --temp-directory.",
        "engine",
        metavar="SIZE",
    ),
    Option(
        "temp_directory",
        TEXT,
        None,
        "Folder DuckDB spills to when over --memory-limit.",
        "engine",
        metavar="DIR",
    ),
    Option("threads", WHOLE, None, "DuckDB worker threads.", "engine", metavar="N", minimum=1),
)

OPTION: dict[str, Option] = {o.name: o for o in OPTIONS}


def group(name: str) -> tuple[Option, ...]:
    """The options of one group, in declaration order."""
    return tuple(o for o in OPTIONS if o.group == name)


def kinds(options: Iterable[Option]) -> dict[str, Kind]:
    """Option name -> kind, the form :func:`check_options` reads."""
    return {o.name: o.kind for o in options}


# The declarations as the checks read them: fit's positional arguments; the keywords of
# ModelSpec.build (and of dry_run); writing back; the engine settings connect(db, ...) takes.
FIT_ARGUMENTS: dict[str, Kind] = kinds(o for o in OPTIONS if o.positional)
SPEC_OPTIONS: dict[str, Kind] = kinds(o for o in group("model") if not o.positional)
DEPLOY_OPTIONS: dict[str, Kind] = kinds(group("deploy"))
ENGINE_OPTIONS: dict[str, Kind] = kinds(o for o in group("engine") if o.name != "db")
FIT_OPTIONS: dict[str, Kind] = kinds(OPTIONS)


# -- the options of indb.explore --------------------------------------------------------------

#: Most quantile bands per numeric column ``indb explore`` cuts (each a WHEN of one CASE).
MAX_BANDS = 1_000

#: The options only ``indb.explore`` has; ``OPTIONS`` (the fit's) does not hold them.
EXPLORE_OWN: tuple[Option, ...] = (
    Option(
        "by",
        NAMES,
        None,
        "Explore this column (repeatable; default: every column but the response and the "
        "columns the offset and weight read).",
        "explore",
        metavar="COL",
    ),
    Option(
        "bands",
        WHOLE,
        10,
        f"Quantile bands each numeric column is cut into (2 to {MAX_BANDS:,}).",
        "explore",
        metavar="N",
        minimum=2,
    ),
    Option(
        "max_shown",
        WHOLE,
        20,
        "Most levels of a categorical column shown, those with the most exposure first; "
        "the rest are summed in one row.",
        "explore",
        metavar="N",
        minimum=1,
    ),
)

#: The options of :func:`indb.explore` in its signature's order: those it shares with the
#: fit (the same declarations: spelling, kind and default) and its own.
EXPLORE_OPTIONS: tuple[Option, ...] = (
    OPTION["source"],
    OPTION["response"],
    OPTION["offset"],
    OPTION["weight"],
    *EXPLORE_OWN,
    OPTION["exclude"],
    OPTION["categorical"],
    *group("engine"),
)
EXPLORE_KINDS: dict[str, Kind] = kinds(EXPLORE_OPTIONS)


def file_keys(table: str) -> dict[str, Kind]:
    """The keys of one table of a spec file (``model``, ``deploy``, ``engine``) and their kinds."""
    return kinds(o for o in group(table) if o.in_file)


def either(choices: Sequence[str]) -> str:
    """``'a', 'b' or 'c'``: allowed values as an error message lists them."""
    quoted = [repr(c) for c in choices]
    return quoted[0] if len(quoted) == 1 else f"{', '.join(quoted[:-1])} or {quoted[-1]}"


def check_choices(values: Mapping[str, Any], options: Iterable[Option] = OPTIONS) -> None:
    """Raise :class:`SpecError` for the first enumerated option given a value it does not allow.

    Options whose names are resolved elsewhere (``family``, ``link``) and values that are
    None (not given) are left alone.
    """
    for option in options:
        value = values.get(option.name)
        enumerated = option.choices and not option.resolved
        if enumerated and value is not None and value not in option.choices:
            raise SpecError(f"{option.name} must be {either(option.choices)}; got {value!r}")
