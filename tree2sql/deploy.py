"""Deploy compiled SQL in place as a view, table, incremental table or function.

One deploy is one transaction: take the name's deploy lock (where the engine has one), read the
manifest, check the source fits the model, drop what the previous active version created,
create the new object, write the manifest row, verify the live object on a sample and
record the result. Anything failing, or a disagreement, rolls all of it back: the
database is as it was and the manifest still tells the truth.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from enum import Enum
from typing import Any

from tree2sql import __version__
from tree2sql.compiler import (
    CompiledQuery,
    ScoringRequest,
    compile_forest,
    feature_columns,
    not_held,
    text_columns,
)
from tree2sql.dialects import Profile, load_profile
from tree2sql.engines import Engine
from tree2sql.errors import UserError
from tree2sql.forest import Forest
from tree2sql.live_verify import summary, verify_deployment
from tree2sql.manifest import (
    Deployment,
    activate_statements,
    create_statement,
    exists,
    insert_statement,
    missing_columns,
    note_statement,
    now,
    read,
    upgrade_statements,
    verification_statement,
)
from tree2sql.schema import check_source, with_row_identity
from tree2sql.sql_functions import drop_statement, function_statement
from tree2sql.verify import Report

DEFAULT_DATABASE = "tree2sql.duckdb"  # used when deploy/status/restore get no --url
DEFAULT_SAMPLE = 1000
# Advisory lock id of the manifest itself (PostgreSQL): taken by a deploy that creates or
# upgrades it. Each deployed name has its own key (name_key), so deploys of one name take
# turns while other names go ahead.
LOCK_KEY = int.from_bytes(hashlib.sha256(b"tree2sql deploy").digest()[:7], "big")


def name_key(name: str) -> int:
    """The advisory lock id of one deployed name (7 bytes: a positive bigint)."""
    return int.from_bytes(hashlib.sha256(b"tree2sql deploy " + name.encode()).digest()[:7],
                          "big")


class Form(Enum):
    VIEW = "view"
    TABLE = "table"
    INCREMENTAL = "incremental"
    FUNCTION = "function"


@dataclass(frozen=True)
class DeployRequest:
    name: str
    form: Form
    scoring: ScoringRequest  # table = the source, keys, column map, prefix, combine
    sample: int = DEFAULT_SAMPLE
    reference: dict[str, Any] | None = None  # monitoring reference JSON, kept in the manifest


@dataclass
class Plan:
    """The statements of one deploy, in order, and the manifest row they produce."""

    statements: list[str]
    deployment: Deployment
    compiled: CompiledQuery
    previous: Deployment | None
    rerun: bool = False  # incremental run of the already active version: no new version
    added: int | None = None  # rows an incremental deploy inserted
    notes: list[str] = field(default_factory=list)


class Disagreement(Exception):
    """The live check found disagreements; the deploy was rolled back."""

    def __init__(self, report: Report) -> None:
        super().__init__(f"{report.disagreements} disagreements")
        self.report = report


def plan(engine: Engine | None, forest: Forest, request: DeployRequest,
         dialect: str | None = None) -> Plan:
    """Work out the statements. With no engine (render only) assume nothing is deployed."""
    profile = load_profile(engine.dialect if engine else dialect or "duckdb")
    scoring = request.scoring
    if not scoring.keys:
        raise UserError("a deploy needs key columns to verify and to score incrementally",
                        "name them with --key (repeat for a compound key)")
    features = feature_columns(forest, scoring.columns)
    history = read(engine, profile, request.name) if engine else []
    previous = next((d for d in history if d.active), None)
    statements = []
    if engine is None or not exists(engine):
        statements.append(create_statement(profile))
    else:
        statements += upgrade_statements(engine, profile)  # manifests made before a column
    # Session settings first: the deploy scores rows (table, incremental, live check) too.
    statements[:0] = [*profile.session_settings,
                      *_lock_statements(engine, profile, request.name)]
    if engine is not None:
        check_source(engine, scoring.table, features, scoring.keys,
                     text_columns(forest, scoring.columns))
        if previous is None and request.form is not Form.FUNCTION:
            _refuse_foreign_object(engine, request.name)
        if request.form is Form.TABLE:  # the one form that always scores every row
            # Shapes that join scans on the row identity (scan_groups) pay off only there.
            # A view is read through filters as often as whole, and a filter on its key
            # reaches the table only in shapes without joins: scan_groups walked all rows
            # in every scan but the first (PostgreSQL, 200k rows, one row: 4.98 s against
            # 0.60 s with case_leaves). An incremental insert scores only the rows not yet
            # inserted, whose few the planner joined in nested loops that walked each scan
            # again for every row (PostgreSQL runs no INSERT in parallel workers, so the
            # scans gain little there; benchmarks/README.md, PostgreSQL shapes).
            request = replace(request, scoring=with_row_identity(engine, scoring))
    creates, compiled = _create_statements(profile, forest, request)
    deployment = Deployment(
        name=request.name, version=max((d.version for d in history), default=0) + 1,
        form=request.form.value, fingerprint=forest.fingerprint(),
        tree2sql_version=__version__, dialect=profile.name, strategy=compiled.strategy,
        combine=scoring.combine.value, model=forest.source, source=scoring.table,
        keys=list(scoring.keys), source_columns=compiled.feature_columns,
        output_columns=_outputs(request, compiled), statements=creates, created_at=now(),
        reference=request.reference)
    if (previous is not None and request.form is Form.INCREMENTAL
            and previous.form == Form.INCREMENTAL.value and previous.statements == creates):
        setup = creates[:len(strategy_setup(profile, compiled))]  # e.g. session variables
        return Plan([*statements, *setup, creates[-1],
                     note_statement(profile, previous.name, previous.version,
                                    f"incremental run {deployment.created_at}")],
                    previous, compiled, previous, rerun=True)
    statements += drop_statements(profile, previous, deployment)
    statements += creates
    statements.append(insert_statement(profile, deployment))
    statements += activate_statements(profile, deployment.name, deployment.version,
                                      f"deployed {deployment.created_at}")
    return Plan(statements, deployment, compiled, previous)


def _outputs(request: DeployRequest, compiled: CompiledQuery) -> list[str]:
    if request.form is Form.FUNCTION:
        return [*request.scoring.keys, *compiled.output_columns]
    return compiled.output_columns


def _header(forest: Forest, request: DeployRequest) -> str:
    return (f"-- tree2sql {__version__} deploy: {request.form.value} {request.name}\n"
            f"-- model fingerprint sha256:{forest.fingerprint()}\n")


def _create_statements(profile: Profile, forest: Forest,
                       request: DeployRequest) -> tuple[list[str], CompiledQuery]:
    """The statements that create the object from nothing (stored for restore), the first
    one headed by the model's fingerprint. A shape's own setup (a model table, session
    variables) runs first; a view or function never gets a session-scoped shape."""
    name = profile.qualified(request.name)
    header = _header(forest, request)
    if request.form is Form.FUNCTION:
        statement, compiled = function_statement(profile, forest, request.scoring,
                                                 request.name)
        return [header + statement], compiled
    compiled = compile_forest(forest, request.scoring, profile.name,
                              persistent=request.form is Form.VIEW)
    setup = strategy_setup(profile, compiled)
    if request.form is Form.VIEW:
        body = [_ddl(profile, "view").format(name=name, query=compiled.sql)]
    elif request.form is Form.TABLE:
        body = [_ddl(profile, "table").format(name=name, query=compiled.sql)]
    else:
        new_rows = compile_forest(forest, replace(request.scoring, scored_in=request.name),
                                  profile.name)
        body = _incremental_statements(profile, request, compiled, new_rows, header)
    first, *rest = [*setup, *body]
    return [header + first, *rest], compiled


def strategy_setup(profile: Profile, compiled: CompiledQuery) -> list[str]:
    """The compiled query's setup without the session settings (which a deploy runs first)."""
    return [s for s in compiled.setup if s not in profile.session_settings]


def _incremental_statements(profile: Profile, request: DeployRequest, compiled: CompiledQuery,
                            new_rows: CompiledQuery, header: str) -> list[str]:
    """An empty table of the outputs (from `compiled`), a unique index on the keys, and the
    insert of `new_rows`: the rows whose keys the table does not hold yet, left out before
    scoring, so that a run scores only them (headed too: each incremental run repeats it).
    The insert checks the keys once more on the scored rows, a few, which also gives the
    SELECT the WHERE clause that SQLite's ON CONFLICT needs after it (SQLite
    documentation, "UPSERT": parsing ambiguity)."""
    name, q = profile.qualified(request.name), profile.quote
    keys = ", ".join(q(k) for k in request.scoring.keys)
    new = q("__t2s_new")
    empty = f"SELECT * FROM (\n{compiled.sql}\n) {new} WHERE 1 = 0"
    index = q(f"{request.name.rpartition('.')[2]}_t2s_keys")
    columns = ", ".join(q(c) for c in compiled.output_columns)
    conflict = profile.ddl.get("insert_conflict", "")
    insert = (f"{header}INSERT INTO {name} ({columns})\nSELECT {columns} FROM (\n"
              f"{new_rows.sql}\n) {new}\n"
              f"WHERE {not_held(profile, request.name, request.scoring.keys, new)}"
              + (f"\n{conflict}" if conflict else ""))
    return [_ddl(profile, "table").format(name=name, query=empty),
            f"CREATE UNIQUE INDEX {index} ON {name} ({keys})", insert]


def _ddl(profile: Profile, form: str) -> str:
    if form not in profile.ddl:
        raise UserError(f"the {profile.name} profile has no {form} template",
                        "add one under [ddl] in its dialects/*.toml file")
    return profile.ddl[form]


def drop_statements(profile: Profile, previous: Deployment | None,
                    new: Deployment) -> list[str]:
    """Remove what the active version created, unless the new one replaces it in place."""
    if previous is None:
        return []
    name = profile.qualified(previous.name)
    if previous.form == Form.FUNCTION.value:
        return [drop_statement(profile, previous.name, len(previous.source_columns))]
    if previous.form == Form.VIEW.value:
        in_place = (new.form == Form.VIEW.value and profile.ddl.get("replace_view", False)
                    and new.output_columns == previous.output_columns)
        return [] if in_place else [f"DROP VIEW {name}"]
    return [f"DROP TABLE {name}"]  # its unique index goes with it


def _refuse_foreign_object(engine: Engine, name: str) -> None:
    """Never replace a table or view that tree2sql did not create."""
    if not engine.has_table(name):
        return
    raise UserError(f"{name!r} already exists and was not deployed by tree2sql",
                    "choose another --name, or drop or rename the existing object")


def deploy(engine: Engine, estimator: Any, forest: Forest, request: DeployRequest,
           progress: Callable[[int], None] | None = None) -> tuple[Plan, Report | None]:
    """Run a deploy in one transaction, verified live before it commits."""
    committing = False
    try:
        with engine.transaction():
            profile = load_profile(engine.dialect)
            taken = _take_turns(engine, profile, request.name)  # before reading the manifest
            result = plan(engine, forest, request)
            before = _count(engine, profile, request.name) if result.rerun else 0
            for statement in result.statements:
                if statement not in taken:
                    engine.execute(statement)
            if request.form is Form.INCREMENTAL:
                result.added = _count(engine, profile, request.name) - before
            target = result.deployment
            report = None
            if request.sample:
                report = verify_deployment(estimator, forest, engine, target, request.sample,
                                           progress)
                engine.execute(verification_statement(profile, target.name, target.version,
                                                      summary(report, request.sample),
                                                      now()))
            if report is not None and not report.agrees:
                raise Disagreement(report)
            committing = True
    except _database_errors() as exc:  # anywhere: lock wait, checks, statements, commit
        raise database_error(exc, "deploy", committing,
                             "fix the cause (see tree2sql deploy --dry-run for the "
                             "statements) and deploy again") from exc
    return result, report


def _count(engine: Engine, profile: Profile, name: str) -> int:
    return int(engine.query(f"SELECT COUNT(*) AS n FROM {profile.qualified(name)}")["n"][0])


def _database_errors() -> tuple[type[BaseException], ...]:
    """Errors raised by the database itself (as opposed to bugs in tree2sql)."""
    import duckdb
    import sqlalchemy as sa

    return (duckdb.Error, sa.exc.DBAPIError)


def _lock_statements(engine: Engine | None, profile: Profile, name: str) -> list[str]:
    """The advisory locks a deploy or restore of `name` takes; none without the DDL key."""
    if "lock" not in profile.ddl:
        return []
    keys = [name_key(name)]
    if engine is None or not exists(engine) or missing_columns(engine):
        keys.insert(0, LOCK_KEY)  # two first deploys must not both create the manifest
    return [profile.ddl["lock"].format(key=key) for key in keys]


def _take_turns(engine: Engine, profile: Profile, name: str) -> list[str]:
    """Wait for other deploys and restores of `name` (and of the manifest, if it must be
    created or upgraded); return the lock statements run.

    Transaction-level advisory locks are released at COMMIT or ROLLBACK, also when the
    session is terminated (PostgreSQL documentation, "Advisory Locks"), and after the wait
    each statement sees what the previous holder committed ("Transaction Isolation", Read
    Committed): versions are numbered without gaps or repeats. Per name, so a deploy held
    up by a reader or a slow build never delays deploys of other names.
    """
    statements = _lock_statements(engine, profile, name)
    for statement in statements:
        engine.execute(statement)
    return statements


def database_error(exc: BaseException, action: str, committing: bool, fix: str) -> UserError:
    """A UserError for a database error during a deploy or restore, naming the cause.

    PostgreSQL's SQLSTATE tells a timeout from a lost session ("PostgreSQL Error Codes":
    57014 query_canceled, 55P03 lock_not_available, 57P0x operator intervention) and
    SQLAlchemy marks a dropped connection `connection_invalidated`. Any of them before
    COMMIT rolls the whole transaction back (transactional DDL); only a connection lost
    during COMMIT leaves the outcome unknown, so that case says so.
    """
    text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    orig = getattr(exc, "orig", None)
    state = str(getattr(orig, "sqlstate", None) or getattr(orig, "pgcode", None) or "")
    lost = bool(getattr(exc, "connection_invalidated", False)) or state.startswith("57P")
    if lost and committing:
        return UserError(f"the connection to the database was lost while committing the "
                         f"{action}, so it may or may not have taken effect: {text}",
                         "run tree2sql status --all on the same URL to see which version "
                         "is active, then repeat the command if it is not the new one")
    if lost:
        return UserError(f"the connection to the database was lost during the {action}; "
                         f"the server rolls back the unfinished transaction, so nothing was "
                         f"changed: {text}",
                         f"check the server and the network (an administrator may have "
                         f"ended the session), then repeat the {action}")
    if state == "57014" and "statement timeout" in text:
        return UserError(f"the {action} ran longer than the database's statement_timeout "
                         f"and was cancelled, so nothing was changed: {text}",
                         "raise statement_timeout for this session, e.g. append "
                         "options=-c%20statement_timeout%3D0 (or a longer limit such as "
                         "30min) to the URL's query string, or ALTER ROLE ... SET "
                         f"statement_timeout; then repeat the {action}")
    if state == "55P03":
        return UserError(f"the {action} waited longer than the database's lock_timeout for "
                         f"a lock another session holds (e.g. a long query on the live "
                         f"object), so nothing was changed: {text}",
                         "let that session finish (see pg_stat_activity / pg_locks), or "
                         "raise lock_timeout for this session, e.g. append "
                         "options=-c%20lock_timeout%3D5min to the URL; then try again")
    return UserError(f"the database refused the {action}, so nothing was changed: {text}",
                     fix)


def restore(engine: Engine, name: str, version: int | None = None) -> tuple[Deployment,
                                                                              Deployment]:
    """Bring back the version before the active one (or `version`): (restored, replaced)."""
    profile = load_profile(engine.dialect)
    committing = False
    try:
        with engine.transaction():
            _take_turns(engine, profile, name)
            history = read(engine, profile, name)
            current = next((d for d in history if d.active), None)
            if current is None:
                raise UserError(f"nothing named {name!r} is deployed here",
                                "list deployments with tree2sql status")
            earlier = [d for d in history if d.version < current.version]
            wanted = ([d for d in history if d.version == version] if version is not None
                      else earlier[-1:])
            if not wanted or wanted[0].version == current.version:
                raise UserError(f"{name!r} has no earlier version to restore "
                                f"(active: version {current.version})",
                                "deploy the model you want instead")
            target = wanted[0]
            if target.dialect != profile.name:
                raise UserError(f"version {target.version} was written for "
                                f"{target.dialect}", "restore it into a database of that "
                                "dialect")
            for statement in [*profile.session_settings,
                              *drop_statements(profile, current, target), *target.statements,
                              *activate_statements(profile, name, target.version,
                                                   f"restored {now()} in place of version "
                                                   f"{current.version}")]:
                engine.execute(statement)
            committing = True
    except _database_errors() as exc:
        raise database_error(exc, "restore", committing,
                             "fix the cause (e.g. a changed source table) and restore "
                             "again") from exc
    return target, current


def record_check(engine: Engine, deployment: Deployment, report: Report,
                 rows: int | None) -> None:
    """Write a later live check of a deployment into its manifest row."""
    profile = load_profile(engine.dialect)
    engine.execute(verification_statement(profile, deployment.name, deployment.version,
                                          summary(report, rows), now()))
