"""Injection: nothing the user supplies as a name or as data can change the meaning of the SQL
indb generates.

Classic payloads go into every user-supplied position: model name, view schema, registry
schema, source and scoring-source names, column names (quoted identifiers in the source),
option lists, categorical level values (which end up in CASE literals of the scoring view and
macro) and offset/weight expressions. After each attempt the database must hold exactly the
expected objects (tables, views, non-internal functions) and rows, and the model deployed
before the attempts must still score correctly.

Data: ``statsmodels.datasets.spector`` (32 students) with a text column whose levels are
payloads; the deployed model is a Poisson fit of TUCE with offset ln(exposure), compared
with statsmodels GLM (test-only oracle) on the same design.
"""

from __future__ import annotations

import dataclasses
import re
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import pytest
import robust_support as R
from numpy.testing import assert_allclose

import indb
from indb import EngineError, IndbError, SpecError
from indb.errors import RegistryError

RTOL = 1e-6
TOL = 1e-12

PAYLOADS = [
    "'; DROP TABLE claims; --",
    '" OR 1=1 --',
    "*/",
    "\\'",
    "x\n; DROP TABLE claims",
    "’; DROP TABLE claims; --",  # unicode right single quote
    "“baseline”",  # unicode double quotes
    "claims; DROP TABLE claims",
    "a/* c */b",
    "x -- c",
    "x\r\nDROP TABLE claims",
    "x'||'y",
    "$$; DROP TABLE claims; $$",
    "x\x00y",
]
# levels of the categorical column of the deployed model: payloads that must stay data
LEVELS = ["'); DROP TABLE claims; --", "x\n-- y", "*/ OR 1=1 /*", "plain"]


def claims_frame() -> pd.DataFrame:
    s = R.spector()
    return pd.DataFrame(
        {
            "row_id": np.arange(len(s)),
            "TUCE": s["TUCE"].astype(float),
            "GPA": s["GPA"],
            "PSI": s["PSI"],
            "band": [LEVELS[i % len(LEVELS)] for i in range(len(s))],
            "exposure": 1.0 + s["PSI"] + s["GRADE"],
        }
    )


def baseline_oracle(frame: pd.DataFrame) -> tuple[Any, pd.DataFrame]:
    X = R.design(frame, ["GPA", "PSI", "band"])
    ref = R.sm_fit(frame["TUCE"], X, "poisson", offset=np.log(frame["exposure"]))
    return ref, X


@dataclass
class Deployed:
    path: Path
    before: dict[str, Any]
    frame: pd.DataFrame
    expected_mean: np.ndarray
    result: indb.FitResult  # the baseline model's fit, for write-back-only attempts

    def con(self, read_only: bool = True) -> duckdb.DuckDBPyConnection:
        return duckdb.connect(str(self.path), read_only=read_only)


def fit_baseline(path: Path, **kwargs: Any) -> indb.FitResult:
    """The baseline model's fit (options in ``kwargs`` override its offset)."""
    options: dict[str, Any] = {"offset": "ln(exposure)", "exclude": ["row_id"], "tol": TOL}
    options.update(kwargs)
    return indb.fit("claims", "TUCE", "poisson", db=str(path), **options)


@pytest.fixture(scope="module")
def template(tmp_path_factory: pytest.TempPathFactory) -> Deployed:
    """A database file with table ``claims`` and model ``baseline`` (view + macro), built
    once; each test works on its own copy."""
    path = tmp_path_factory.mktemp("injection") / "template.duckdb"
    frame = claims_frame()
    R.write_db(path, {"claims": frame})
    res = fit_baseline(path, name="baseline", intervals=True)
    ref, X = baseline_oracle(frame)
    R.assert_coefs(res, ref, rtol=RTOL, se_rtol=RTOL)
    expected = ref.predict(X, offset=np.log(frame["exposure"])).to_numpy()
    before = R.dump_file(path)
    names = R.object_names(before)
    registry = {(R.DEFAULT_REGISTRY, t) for t in R.REGISTRY_TABLES}
    assert names["tables"] == {("main", "claims"), *registry}
    assert names["views"] == {("main", "baseline")}
    assert names["functions"] == {("main", "baseline_score"), ("main", "baseline_unseen")}
    return Deployed(path, before, frame, expected, res)


@pytest.fixture
def deployed(template: Deployed, tmp_path: Path) -> Deployed:
    path = tmp_path / "inj.duckdb"
    shutil.copyfile(template.path, path)
    return dataclasses.replace(template, path=path)


def assert_serves(d: Deployed) -> None:
    """The deployed view and macro still give statsmodels' predictions for every row."""
    with d.con() as con:
        view = con.execute(
            "SELECT row_id, score_mean, score_unseen FROM baseline ORDER BY row_id"
        ).fetchall()
        macro = con.execute(
            "SELECT baseline_score(GPA, PSI, band, exposure) FROM claims ORDER BY row_id"
        ).fetchall()
    assert [r[0] for r in view] == list(range(32))
    assert_allclose([r[1] for r in view], d.expected_mean, rtol=RTOL)
    assert [r[2] for r in view] == [0] * 32
    assert_allclose([r[0] for r in macro], d.expected_mean, rtol=RTOL)


def assert_untouched(d: Deployed) -> None:
    assert R.dump_file(d.path) == d.before
    assert_serves(d)


def test_deployed_model_scores_hostile_levels(deployed: Deployed) -> None:
    # The levels are in the CASE literals of the view and macro and score correctly.
    assert_serves(deployed)
    with deployed.con() as con:
        (sql,) = con.execute(
            "SELECT sql FROM duckdb_views() WHERE view_name = 'baseline'"
        ).fetchone()
    # every level appears as an escaped string literal (quotes doubled), never as bare SQL
    for level in LEVELS[:3]:
        assert "'" + level.replace("'", "''") + "'" in sql


# -- names: model, view schema, registry schema ----------------------------------------------
@pytest.mark.parametrize("payload", PAYLOADS[:4], ids=range(4))
def test_payload_as_a_model_name_through_fit(deployed: Deployed, payload: str) -> None:
    with pytest.raises(SpecError, match="model name"):
        fit_baseline(deployed.path, name=payload)
    assert_untouched(deployed)


@pytest.mark.parametrize("payload", PAYLOADS[:6], ids=range(6))
def test_payload_as_registry_schema_of_a_handle(deployed: Deployed, payload: str) -> None:
    with pytest.raises(SpecError, match="registry schema"):
        indb.api.registry(str(deployed.path), schema=payload)
    assert_untouched(deployed)


@pytest.mark.parametrize("option", ["name", "view_schema", "registry_schema"])
def test_name_with_a_trailing_newline_is_refused(deployed: Deployed, option: str) -> None:
    kwargs = {"name": "refit", option: "refit\n"}
    name = kwargs.pop("name")
    with pytest.raises(SpecError):
        indb.api.deploy(deployed.result, name, db=str(deployed.path), **kwargs)
    assert_untouched(deployed)


def test_model_name_differing_only_in_case_is_refused(deployed: Deployed) -> None:
    # DuckDB identifiers ignore case: model 'Baseline' would replace the view and macro of
    # model 'baseline'
    with pytest.raises(RegistryError, match="'Baseline' differs only in case from.*'baseline'"):
        indb.fit(
            "SELECT row_id, TUCE, GPA FROM claims",
            "TUCE",
            "poisson",
            db=str(deployed.path),
            exclude=["row_id"],
            name="Baseline",
        )
    assert_untouched(deployed)


@pytest.mark.parametrize("kind", ["view", "macro", "table", "view-other-case"])
def test_existing_user_view_or_macro_is_not_replaced(deployed: Deployed, kind: str) -> None:
    # the write-back runs CREATE OR REPLACE VIEW/MACRO: an object of the user's with the
    # model's name (or name_score) must be refused, not replaced
    ddl = {
        "view": ("CREATE VIEW report AS SELECT 42 AS answer", "view 'report'"),
        "macro": ("CREATE MACRO report_score(a) AS a + 1", "macro 'report_score'"),
        "table": ("CREATE TABLE report AS SELECT 42 AS answer", "base table 'report'"),
        "view-other-case": ('CREATE VIEW "REPORT" AS SELECT 42 AS answer', "view 'REPORT'"),
    }
    sql, named = ddl[kind]
    with duckdb.connect(str(deployed.path)) as con:
        con.execute(sql)
    deployed.before = R.dump_file(deployed.path)
    with pytest.raises(RegistryError, match=f"would replace {named}.*drop that object"):
        indb.api.deploy(deployed.result, "report", db=str(deployed.path))
    assert_untouched(deployed)
    # held (not deployed) is allowed; promoting it later is refused the same way
    indb.api.deploy(deployed.result, "report", db=str(deployed.path), promote=False)
    reg = indb.api.registry(str(deployed.path))
    try:
        with pytest.raises(RegistryError, match=f"would replace {named}"):
            reg.promote("report", 1)
    finally:
        reg.engine.close()


def test_own_view_is_replaced_on_refit(deployed: Deployed) -> None:
    # the model's own view and macro (deployed by indb for its live version) are replaced
    res = indb.api.deploy(deployed.result, "baseline", db=str(deployed.path), new_version=True)
    assert res.deployment["promoted"] and res.deployment["version"] == 2
    assert_serves(deployed)


# -- sources, scoring sources, column options -------------------------------------------------
def test_payload_as_source_or_score_source(deployed: Deployed) -> None:
    for payload in PAYLOADS:
        with pytest.raises(SpecError):
            indb.fit(payload, "TUCE", "poisson", db=str(deployed.path), name="refit")
        assert R.dump_file(deployed.path) == deployed.before, payload
        # a scoring source that does not exist or is malformed: SpecError (a missing one
        # names the option: see the test below)
        with pytest.raises(SpecError):
            indb.api.deploy(deployed.result, "refit", db=str(deployed.path), score_source=payload)
        assert R.dump_file(deployed.path) == deployed.before, payload
    assert_serves(deployed)


def test_missing_score_source_is_a_spec_error_naming_the_option(deployed: Deployed) -> None:
    with pytest.raises(SpecError, match="scoring source 'nope' .option score_source.*nope"):
        indb.api.deploy(deployed.result, "refit", db=str(deployed.path), score_source="nope")
    assert_untouched(deployed)


def test_query_sources_with_a_second_statement_are_refused(deployed: Deployed) -> None:
    for source in (
        "SELECT * FROM claims; DROP TABLE claims",
        "SELECT * FROM claims; DROP TABLE claims;",
        "SELECT * FROM claims;\nDELETE FROM claims",
    ):
        with pytest.raises(SpecError, match="single SELECT"):
            indb.fit(source, "TUCE", "poisson", db=str(deployed.path), name="refit")
        with pytest.raises(SpecError, match="single SELECT"):
            indb.api.deploy(deployed.result, "refit", db=str(deployed.path), score_source=source)
    assert_untouched(deployed)


@pytest.mark.parametrize(
    "option",
    ["response", "exclude", "predictors", "categorical", "interactions", "splines", "reference"],
)
def test_payload_as_a_column_option(deployed: Deployed, option: str) -> None:
    for payload in PAYLOADS:
        kwargs: dict[str, Any] = {
            "exclude": {"exclude": ["row_id", payload]},
            "predictors": {"predictors": ["GPA", payload]},
            "categorical": {"categorical": [payload]},
            "interactions": {"interactions": [("GPA", payload)]},
            "splines": {"splines": {payload: 3}},
            "reference": {"reference": {payload: "plain"}},
            "response": {},
        }[option]
        response = payload if option == "response" else "TUCE"
        with pytest.raises(SpecError, match=re.escape(repr(payload)) + ".*not in the source"):
            indb.fit(
                "claims",
                response,
                "poisson",
                db=str(deployed.path),
                name="refit",
                **({"exclude": ["row_id"]} | kwargs),
            )
        assert R.dump_file(deployed.path) == deployed.before, payload
    assert_serves(deployed)


def test_payload_reference_level_stays_data(deployed: Deployed) -> None:
    res = fit_baseline(deployed.path, reference={"band": LEVELS[0]})
    X = R.design(deployed.frame, ["GPA", "PSI", "band"], reference={"band": LEVELS[0]})
    assert res.terms == list(X.columns)
    ref = R.sm_fit(deployed.frame["TUCE"], X, "poisson", offset=np.log(deployed.frame["exposure"]))
    R.assert_coefs(res, ref, rtol=RTOL, se_rtol=RTOL)
    assert_untouched(deployed)


# -- column names and levels of a new model ---------------------------------------------------
COLUMN_NAME_SETS = [
    ("'; DROP TABLE claims; --", '" OR 1=1 --', "*/", "\\'"),
    ("x\n; DROP TABLE claims", "’; DROP TABLE claims; --", "a/* c */b", "x -- c"),
    ("select", "from", "$$; DROP TABLE claims; $$", "x'||'y"),
]
NEW_LEVELS = ["'||(SELECT 1)||'", "\\", "--", "x\r\ny", "ok"]


@pytest.mark.parametrize("names", COLUMN_NAME_SETS, ids=range(len(COLUMN_NAME_SETS)))
def test_payload_column_names_and_levels_deploy_safely(
    deployed: Deployed, names: tuple[str, ...]
) -> None:
    # A new table whose response, predictor, categorical and exposure columns carry payload
    # names and whose levels are payloads; the model is deployed with an offset over the
    # payload-named exposure column. Expected afterwards: the old objects untouched, exactly
    # one new table, view and macro, and the new view and macro scoring like statsmodels.
    y, x, cat, expo = names
    base = deployed.frame
    frame = pd.DataFrame(
        {
            "row_id": base["row_id"],
            y: base["TUCE"],
            x: base["GPA"],
            cat: [NEW_LEVELS[i % len(NEW_LEVELS)] for i in range(32)],
            expo: base["exposure"],
        }
    )
    with duckdb.connect(str(deployed.path)) as con:
        R.load(con, "inj", frame)
    res = indb.fit(
        "inj",
        y,
        "poisson",
        db=str(deployed.path),
        offset=f"ln({R.quote_ident(expo)})",
        exclude=["row_id"],
        name="inj_model",
        tol=TOL,
    )
    X = R.design(frame, [x, cat])
    assert res.terms == list(X.columns)
    ref = R.sm_fit(frame[y], X, "poisson", offset=np.log(frame[expo]))
    R.assert_coefs(res, ref, rtol=RTOL, se_rtol=RTOL)

    after = R.dump_file(deployed.path)
    old, new = R.object_names(deployed.before), R.object_names(after)
    assert new["tables"] == old["tables"] | {("main", "inj")}
    assert new["views"] == old["views"] | {("main", "inj_model")}
    assert new["functions"] == old["functions"] | {
        ("main", "inj_model_score"),
        ("main", "inj_model_unseen"),
    }
    for key, table in deployed.before["tables"].items():
        if key[0] == "main":
            assert after["tables"][key] == table  # claims: same rows
        else:
            assert set(table["rows"]) <= set(after["tables"][key]["rows"])  # registry grew
    assert [v for v in after["views"] if v[1] == "baseline"] == [
        v for v in deployed.before["views"] if v[1] == "baseline"
    ]
    expected = ref.predict(X, offset=np.log(frame[expo])).to_numpy()
    args = ", ".join(R.quote_ident(c) for c in (x, cat, expo))
    with deployed.con() as con:
        view = con.execute("SELECT score_mean FROM inj_model ORDER BY row_id").fetchall()
        macro = con.execute(f"SELECT inj_model_score({args}) FROM inj ORDER BY row_id").fetchall()
        n = con.execute("SELECT count(*) FROM inj").fetchone()[0]
    assert_allclose([r[0] for r in view], expected, rtol=RTOL)
    assert_allclose([r[0] for r in macro], expected, rtol=RTOL)
    assert n == 32
    assert_serves(deployed)


def test_unseen_payload_level_scores_as_the_reference(deployed: Deployed) -> None:
    # Scoring data (bound as parameters, as an application would) with a level never seen in
    # training: the macro gives the reference level's prediction.
    ref, X = baseline_oracle(deployed.frame)
    row = deployed.frame.iloc[0]
    x0 = pd.DataFrame([{c: 0.0 for c in X.columns}])
    x0["intercept"], x0["GPA"], x0["PSI"] = 1.0, row["GPA"], row["PSI"]
    expected = float(ref.predict(x0, offset=np.log([row["exposure"]]))[0])
    with deployed.con() as con:
        for level in PAYLOADS:
            got = con.execute(
                "SELECT baseline_score(?, ?, ?, ?)",
                [float(row["GPA"]), float(row["PSI"]), level, float(row["exposure"])],
            ).fetchone()[0]
            assert_allclose(got, expected, rtol=RTOL, err_msg=repr(level))
    assert_untouched(deployed)


def test_unseen_payload_levels_are_flagged_in_a_scoring_view(deployed: Deployed) -> None:
    # Deploy the model over a scoring table that adds rows with payload levels: they score
    # with the reference contribution and score_unseen = 1.
    extra = deployed.frame.iloc[:3].assign(row_id=[100, 101, 102], band=PAYLOADS[:3])
    with duckdb.connect(str(deployed.path)) as con:
        R.load(con, "claims_more", pd.concat([deployed.frame, extra], ignore_index=True))
    res = fit_baseline(deployed.path)
    indb.api.deploy(res, "more_scores", db=str(deployed.path), score_source="claims_more")
    ref, X = baseline_oracle(deployed.frame)
    x_extra = pd.DataFrame(0.0, index=extra.index, columns=X.columns)
    x_extra["intercept"], x_extra["GPA"], x_extra["PSI"] = 1.0, extra["GPA"], extra["PSI"]
    expected = ref.predict(x_extra, offset=np.log(extra["exposure"])).to_numpy()
    with deployed.con() as con:
        rows = con.execute(
            "SELECT score_mean, score_unseen FROM more_scores WHERE row_id >= 100 ORDER BY row_id"
        ).fetchall()
        n = con.execute("SELECT count(*) FROM more_scores WHERE score_unseen = 0").fetchone()[0]
    assert_allclose([r[0] for r in rows], expected, rtol=RTOL)
    assert [r[1] for r in rows] == [1, 1, 1]
    assert n == 32
    assert_serves(deployed)


# -- offset and weight expressions --------------------------------------------------------------
@dataclass(frozen=True)
class Expr:
    id: str
    option: str  # offset | weight
    text: str
    outcome: str  # "reject": SpecError; "same": equals the plain expression's fit
    plain: str = "ln(exposure)"
    xfail: str | None = None


EXPRESSIONS = [
    Expr("two-statements", "offset", "ln(exposure); DROP TABLE claims", "reject"),
    Expr("newline-statement", "offset", "ln(exposure)\n; DROP TABLE claims", "reject"),
    Expr("comment-wrapped", "offset", "ln(exposure) /* */; DROP TABLE claims; /* */", "reject"),
    Expr("close-paren", "offset", "ln(exposure)) FROM claims; DROP TABLE claims; --", "reject"),
    Expr("quote-break", "offset", "ln(exposure)' OR '1'='1", "reject"),
    Expr("subquery", "offset", "ln((SELECT max(exposure) FROM claims))", "reject"),
    Expr("exists", "offset", "ln(exposure) + CASE WHEN EXISTS(SELECT 1) THEN 0 END", "reject"),
    Expr("close-comment", "weight", "exposure */ DROP TABLE claims", "reject", "exposure"),
    Expr("delete", "weight", "(DELETE FROM claims)", "reject", "exposure"),
    Expr("weight-statement", "weight", "1; DELETE FROM claims", "reject", "exposure"),
    Expr("line-comment", "offset", "ln(exposure) -- '; DROP TABLE claims; --", "same"),
    Expr("comment-closer", "offset", "ln(exposure) -- */ DROP TABLE claims; /*", "same"),
    Expr("block-comment", "offset", "ln(exposure) /* '; DROP TABLE claims; -- */", "same"),
    Expr("literal", "offset", "ln(exposure) + 0 * length('; DROP TABLE claims; --')", "same"),
    Expr("quoted-ident", "offset", 'ln("exposure")', "same"),
    Expr("weight-comment", "weight", "exposure -- ; DELETE FROM claims", "same", "exposure"),
    Expr(
        "unicode-quotes",
        "offset",
        "’ln(exposure)’",
        "reject",
    ),
    Expr(
        "alias",
        "offset",
        "ln(exposure) AS x",
        "reject",
    ),
    Expr(
        "star-columns",
        "offset",
        "COLUMNS('exp.*')",
        "reject",
    ),
    Expr(
        "positional",
        "offset",
        "ln(#6)",
        "reject",
    ),
    Expr(
        "parameter",
        "offset",
        "ln($1)",
        "reject",
    ),
]


def _expr_param(e: Expr) -> Any:
    marks = [pytest.mark.xfail(strict=True, reason=e.xfail)] if e.xfail else []
    return pytest.param(e, id=e.id, marks=marks)


@pytest.mark.parametrize("expr", [_expr_param(e) for e in EXPRESSIONS])
def test_offset_and_weight_payloads(deployed: Deployed, expr: Expr) -> None:
    kwargs: dict[str, Any] = {"offset": "ln(exposure)"}
    kwargs[expr.option] = expr.text
    if expr.outcome == "reject":
        with pytest.raises(SpecError) as info:
            fit_baseline(deployed.path, name="expr_model", **kwargs)
        assert expr.option in str(info.value)
        assert_untouched(deployed)
        return
    plain = dict(kwargs, **{expr.option: expr.plain})
    res = fit_baseline(deployed.path, name="expr_model", **kwargs)
    ref = fit_baseline(deployed.path, **plain)
    assert_allclose(res.estimates, ref.estimates, rtol=1e-12, atol=1e-12)  # thread order: ~1e-15
    # deployed: the view and macro (with the expression rendered inside) score like the
    # plain expression's model, and only they were added
    after = R.dump_file(deployed.path)
    old, new = R.object_names(deployed.before), R.object_names(after)
    assert new["tables"] == old["tables"]
    assert new["views"] == old["views"] | {("main", "expr_model")}
    assert new["functions"] == old["functions"] | {
        ("main", "expr_model_score"),
        ("main", "expr_model_unseen"),
    }
    with deployed.con() as con:
        view = con.execute("SELECT score_mean FROM expr_model ORDER BY row_id").fetchall()
        claims = con.execute("SELECT * FROM claims ORDER BY row_id").fetchall()
    if expr.option == "offset":
        assert_allclose([r[0] for r in view], deployed.expected_mean, rtol=RTOL)
    assert len(claims) == 32
    assert after["tables"][("main", "claims")] == deployed.before["tables"][("main", "claims")]
    assert_serves(deployed)


def _sweep(deployed: Deployed, positions: list[str]) -> dict[str, int]:
    """Every payload in every position: the outcome counts (error class or 'accepted')."""
    seen: dict[str, int] = {}
    for payload in PAYLOADS:
        for position in positions:
            try:
                if position in ("name", "view_schema", "registry_schema"):
                    kwargs = {} if position == "name" else {position: payload}
                    name = payload if position == "name" else "refit"
                    indb.api.deploy(deployed.result, name, db=str(deployed.path), **kwargs)
                else:
                    fit_baseline(deployed.path, **{position: payload})
            except IndbError as err:
                key = type(err).__name__
                if position in ("name", "view_schema", "registry_schema"):
                    what = {"name": "model name"}.get(position, position.replace("_", " "))
                    assert what in str(err) and "letters, digits or underscores" in str(err)
            else:
                key = "accepted"
            seen[key] = seen.get(key, 0) + 1
            # after every attempt: exactly the objects and rows of before
            assert R.dump_file(deployed.path) == deployed.before, (position, payload)
    return seen


def test_name_positions_raise_spec_errors_only(deployed: Deployed) -> None:
    seen = _sweep(deployed, ["name", "view_schema", "registry_schema"])
    assert seen == {"SpecError": 3 * len(PAYLOADS)}
    assert_untouched(deployed)


def test_expression_positions_raise_indb_errors_only(deployed: Deployed) -> None:
    # Whatever the payload, the caller sees an IndbError: SpecError, or EngineError where
    # DuckDB itself refused (e.g. a dollar-quoted string that is not a number).
    seen = _sweep(deployed, ["offset", "weight"])
    assert set(seen) <= {"SpecError", "EngineError"}, seen
    assert_untouched(deployed)


@pytest.mark.parametrize(
    ("source", "options"),
    [
        ("claims", {"offset": "'; DROP TABLE claims; --"}),
        ("claims", {"weight": 'exposure"'}),
        ("SELECT 'abc FROM claims", {}),
        ('SELECT "abc FROM claims', {}),
    ],
    ids=["offset", "weight", "query-single-quote", "query-double-quote"],
)
def test_unterminated_quote_is_a_spec_error(
    deployed: Deployed, source: str, options: dict[str, str]
) -> None:
    with pytest.raises(SpecError) as info:
        indb.fit(source, "TUCE", "poisson", db=str(deployed.path), **options)
    # the message names the option (or the source query) and its text, and the likely cause
    msg = str(info.value)
    for option, text in options.items():
        assert f"cannot parse {option} expression {text!r}" in msg, msg
    if not options:
        assert f"cannot parse the source query {source!r}" in msg, msg
    assert "quote left unclosed" in msg, msg
    assert_untouched(deployed)


def test_engine_error_payloads_leave_the_database_alone(deployed: Deployed) -> None:
    # A payload DuckDB refuses at bind time: nothing written.
    with pytest.raises(EngineError):
        fit_baseline(deployed.path, name="refit", offset="ln(no_such_function(exposure))")
    assert_untouched(deployed)
