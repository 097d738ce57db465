"""text_arrays' walk with every node array declared once, as a session variable, before the
statement (Spark 4: `DECLARE OR REPLACE VARIABLE name DEFAULT CAST(split('...') ...)`).

Why this shape (figures in benchmarks/README.md): Spark has no named constants, so
text_arrays writes each array where a step reads it and Spark folds every copy into a literal
of its own, one per level: 33.7 MB of statement and a dozen copies of every array for the
default forest. A variable is folded once and every step reads that one array.

Variables live in the session, so a persisted view cannot read them (the planner passes this
shape over for views and functions: `session_scoped`), and their names carry the model's
fingerprint, so two models scored in one session never read each other's arrays.

Profile key: `array_variable` over {name} and {value}; the rest as text_arrays.
"""

from __future__ import annotations

from tree2sql.dialects import Profile
from tree2sql.strategies.base import Context, require_keys
from tree2sql.strategies.text_arrays import REQUIRED_KEYS, TextArrays


class DeclaredArrays(TextArrays):
    name = "declared_arrays"
    summary = ("text_arrays with each node array declared once as a session variable "
               "(Spark 4; not for views)")
    session_scoped = True

    def _check(self, profile: Profile) -> None:
        require_keys(profile, (*REQUIRED_KEYS, "array_variable"), self.name)

    def _carried(self, profile: Profile) -> bool:
        return False

    def _array_name(self, ctx: Context, what: str, t: int) -> str:
        return self._name(ctx, f"{ctx.forest.fingerprint()[:16]}_{what}", t)  # cached hash

    def _array_at(self, ctx: Context, what: str, t: int) -> str:
        return self._array_name(ctx, what, t)

    def setup_statements(self, ctx: Context) -> list[str]:
        if self._walked_levels(ctx.forest) == 0:
            return []
        template = ctx.profile.raw["array_variable"]
        return [template.format(name=name, value=value)
                for name, value in self._model_arrays(ctx)]
