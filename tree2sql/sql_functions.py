"""The function form: the compiled query wrapped as a SQL function of the feature values.

The body reuses the whole compiled query, reading one row built from the arguments, so
the function obeys the same exactness rules as the view (and passes the same verifier).
How a dialect returns several outputs is profile data (`function_result` under [ddl]):
`struct` (DuckDB macro returning a STRUCT literal), `table` (RETURNS TABLE, one row per
call, called with LATERAL) or `select_as_struct` (BigQuery: RETURNS STRUCT<...>).
"""

from __future__ import annotations

from dataclasses import replace

from tree2sql.compiler import CompiledQuery, ScoringRequest, compile_forest
from tree2sql.dialects import Profile
from tree2sql.errors import UserError
from tree2sql.forest import Forest

ARGS_RELATION = "t2s_args"  # the one-row relation of argument values inside the body
RESULT = "__t2s_r"
DOLLAR_TAG = "$t2s$"


def argument(i: int) -> str:
    """Argument names use the compiler's reserved prefix, so they never meet a column."""
    return f"__t2s_arg{i}"


def _templates(profile: Profile) -> tuple[str, str, str]:
    ddl = profile.ddl
    if "function" not in ddl:
        raise UserError(f"tree2sql has no function form for {profile.name}",
                        "deploy --as view or --as table instead")
    return ddl["function"], ddl.get("function_param", "{name} {type}"), \
        ddl.get("function_result", "table")


def output_types(profile: Profile, forest: Forest, compiled: CompiledQuery) -> list[str]:
    """SQL type of each output column: doubles for scores, the labels' own type."""
    types = [profile.double_type] * len(compiled.score_columns)
    if compiled.label_column:
        label_types = profile.ddl.get("label_types", {})
        sample = forest.classes[0]
        kind = "bool" if isinstance(sample, bool) else "int" if isinstance(sample, int) \
            else "float" if isinstance(sample, float) else "str"
        defaults = {"float": profile.double_type, "int": profile.integer_type,
                    "bool": "BOOLEAN", "str": "VARCHAR"}
        types.append(label_types.get(kind, defaults[kind]))
    return types


def function_statement(profile: Profile, forest: Forest, request: ScoringRequest,
                       name: str) -> tuple[str, CompiledQuery]:
    """CREATE statement of the function form, and the compiled query inside it."""
    template, param, style = _templates(profile)
    if forest.inputs is not None and any(forest.inputs.text):
        raise UserError("the function form takes numbers, but this pipeline reads text "
                        "columns", "deploy the pipeline as a view or table instead")
    compiled = compile_forest(forest, replace(request, table=ARGS_RELATION, keys=()),
                              profile.name, persistent=True)
    q = profile.quote
    args = [argument(i) for i in range(len(compiled.feature_columns))]
    row = ", ".join(f"{a} AS {q(c)}" for a, c in zip(args, compiled.feature_columns,
                                                      strict=True))
    outputs = compiled.output_columns
    types = output_types(profile, forest, compiled)
    typed = [f"{q(c)} {t}" for c, t in zip(outputs, types, strict=True)]
    returns = f"TABLE ({', '.join(typed)})"
    if style == "struct":
        result = "{" + ", ".join(f"{profile.string(c)}: {q(c)}" for c in outputs) + "}"
    else:
        result = ", ".join(f"CAST({q(c)} AS {t}) AS {q(c)}"
                           for c, t in zip(outputs, types, strict=True))
    if style == "select_as_struct":
        result, returns = f"AS STRUCT {result}", f"STRUCT<{', '.join(typed)}>"
    body = (f"WITH {q(ARGS_RELATION)} AS (SELECT {row})\nSELECT {result} FROM (\n"
            f"{compiled.sql}\n) {q('__t2s_f')}")
    if style == "select_as_struct":
        body = f"({body})"
    if DOLLAR_TAG in body:
        raise UserError(f"the function body contains {DOLLAR_TAG}, which quotes it",
                        "rename the class label or column that contains it")
    statement = template.format(
        name=profile.qualified(name),
        params=", ".join(param.format(name=a, type=profile.double_type) for a in args),
        returns=returns, body=body)
    return statement, compiled


def drop_statement(profile: Profile, name: str, n_args: int) -> str:
    template = profile.ddl.get("drop_function", "DROP FUNCTION {name}({types})")
    return template.format(name=profile.qualified(name),
                           types=", ".join([profile.double_type] * n_args))


def call_query(profile: Profile, name: str, source: str, keys: list[str],
               feature_columns: list[str], outputs: list[str]) -> str:
    """Keys and outputs of the function applied to every row of `source`."""
    _, _, style = _templates(profile)
    q, s = profile.quote, profile.quote("__t2s_src")
    args = ", ".join(profile.cast_double(f"{s}.{q(c)}") for c in feature_columns)
    call = f"{profile.qualified(name)}({args})"
    key_list = ", ".join(f"{s}.{q(k)}" for k in keys)
    if style == "struct":
        fields = ", ".join(f"struct_extract({q(RESULT)}, {profile.string(c)}) AS {q(c)}"
                           for c in outputs)
        keys_out = ", ".join(q(k) for k in keys)
        return (f"SELECT {keys_out}, {fields} FROM (\nSELECT {key_list}, {call} AS {q(RESULT)}"
                f"\nFROM {profile.qualified(source)} {s}\n) {q('__t2s_c')}")
    return (f"SELECT {key_list}, {q(RESULT)}.*\nFROM {profile.qualified(source)} {s}\n"
            f"CROSS JOIN LATERAL {call} {q(RESULT)}")
