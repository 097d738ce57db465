-- tree2sql 0.1.0: scikit-learn RandomForestClassifier (3 trees)
-- model fingerprint sha256:33dc85aced683fe47dfbfed29c8abc7e1037fbb1e15363e2c71b6d56eb7d3ebb
-- dialect sqlite, strategy nested_case, combine average
-- Scores can decide things about people: verify this SQL against the model (tree2sql verify) before use, keep model and SQL under review, and follow your organisation's model-risk practice and local rules.
WITH "__t2s_input" AS MATERIALIZED (
SELECT "row id",
  CAST("x0" AS REAL) + 0.0e0 AS "__t2s_f0",
  CAST("x1" AS REAL) + 0.0e0 AS "__t2s_f1",
  CAST("x2" AS REAL) + 0.0e0 AS "__t2s_f2",
  CAST("x3" AS REAL) + 0.0e0 AS "__t2s_f3"
FROM "sales"."iris rows"
),
"__t2s_checked" AS (
SELECT "__t2s_input".*, CASE WHEN ABS("__t2s_f0") >= coalesce((CAST(33554431 AS REAL) * 4611686018427387904 * 2199023255552), 0) OR ABS("__t2s_f1") >= coalesce((CAST(33554431 AS REAL) * 4611686018427387904 * 2199023255552), 0) OR ABS("__t2s_f2") >= coalesce((CAST(33554431 AS REAL) * 4611686018427387904 * 2199023255552), 0) OR ABS("__t2s_f3") >= coalesce((CAST(33554431 AS REAL) * 4611686018427387904 * 2199023255552), 0) THEN 0 ELSE 1 END AS "__t2s_ok"
FROM "__t2s_input"
),
"__t2s_scores" AS MATERIALIZED (
SELECT "row id",
  CASE WHEN "__t2s_ok" = 1 THEN (CASE WHEN "__t2s_f0" <= coalesce((5450000047683716 / 1e15), 0) THEN CASE WHEN "__t2s_f1" <= coalesce((2850000023841858 / 1e15), 0) THEN 0.0e0 ELSE 1.0e0 END ELSE CASE WHEN "__t2s_f0" <= coalesce((6049999952316283 / 1e15), 0) THEN CASE WHEN "__t2s_f2" > coalesce((4850000143051147 / 1e15), 0) THEN 0.0e0 ELSE coalesce((CAST(2573485501354569 AS REAL) / 18014398509481984), 0) END ELSE CASE WHEN "__t2s_f2" <= coalesce((4799999952316283 / 1e15), 0) THEN 0.0e0 ELSE 0.0e0 END END END
    + CASE WHEN "__t2s_f0" <= coalesce((5549999952316283 / 1e15), 0) THEN CASE WHEN "__t2s_f2" > coalesce((CAST(20552089 AS REAL) / 8388608), 0) THEN CASE WHEN "__t2s_f3" > coalesce((CAST(7205759779602431 AS REAL) / 4503599627370496), 0) THEN 0.0e0 ELSE 0.0e0 END ELSE 1.0e0 END ELSE CASE WHEN "__t2s_f3" <= coalesce((CAST(7656119312842751 AS REAL) / 4503599627370496), 0) THEN CASE WHEN "__t2s_f2" > coalesce((5000000238418579 / 1e15), 0) THEN 0.0e0 ELSE 0.0e0 END ELSE CASE WHEN "__t2s_f2" <= coalesce((4850000143051147 / 1e15), 0) THEN 0.0e0 ELSE 0.0e0 END END END
    + CASE WHEN "__t2s_f3" <= coalesce((7500000298023224 / 1e16), 0) THEN 1.0e0 ELSE CASE WHEN "__t2s_f3" > coalesce((CAST(7430939546222591 AS REAL) / 4503599627370496), 0) THEN CASE WHEN "__t2s_f2" <= coalesce((4850000143051147 / 1e15), 0) THEN 0.0e0 ELSE 0.0e0 END ELSE CASE WHEN "__t2s_f3" > coalesce((1550000011920929 / 1e15), 0) THEN 0.0e0 ELSE 0.0e0 END END END) / 3.0e0 END AS "__t2s_p0",
  CASE WHEN "__t2s_ok" = 1 THEN (CASE WHEN "__t2s_f0" <= coalesce((5450000047683716 / 1e15), 0) THEN CASE WHEN "__t2s_f1" <= coalesce((2850000023841858 / 1e15), 0) THEN 1.0e0 ELSE 0.0e0 END ELSE CASE WHEN "__t2s_f0" <= coalesce((6049999952316283 / 1e15), 0) THEN CASE WHEN "__t2s_f2" > coalesce((4850000143051147 / 1e15), 0) THEN 0.0e0 ELSE coalesce((8571428571428571 / 1e16), 0) END ELSE CASE WHEN "__t2s_f2" <= coalesce((4799999952316283 / 1e15), 0) THEN 1.0e0 ELSE coalesce((CAST(857828500451523 AS REAL) / 18014398509481984), 0) END END END
    + CASE WHEN "__t2s_f0" <= coalesce((5549999952316283 / 1e15), 0) THEN CASE WHEN "__t2s_f2" > coalesce((CAST(20552089 AS REAL) / 8388608), 0) THEN CASE WHEN "__t2s_f3" > coalesce((CAST(7205759779602431 AS REAL) / 4503599627370496), 0) THEN 0.0e0 ELSE 1.0e0 END ELSE 0.0e0 END ELSE CASE WHEN "__t2s_f3" <= coalesce((CAST(7656119312842751 AS REAL) / 4503599627370496), 0) THEN CASE WHEN "__t2s_f2" > coalesce((5000000238418579 / 1e15), 0) THEN 0.0e0 ELSE 1.0e0 END ELSE CASE WHEN "__t2s_f2" <= coalesce((4850000143051147 / 1e15), 0) THEN coalesce((2 / 1e1), 0) ELSE 0.0e0 END END END
    + CASE WHEN "__t2s_f3" <= coalesce((7500000298023224 / 1e16), 0) THEN 0.0e0 ELSE CASE WHEN "__t2s_f3" > coalesce((CAST(7430939546222591 AS REAL) / 4503599627370496), 0) THEN CASE WHEN "__t2s_f2" <= coalesce((4850000143051147 / 1e15), 0) THEN coalesce((5 / 1e1), 0) ELSE coalesce((25 / 1e3), 0) END ELSE CASE WHEN "__t2s_f3" > coalesce((1550000011920929 / 1e15), 0) THEN coalesce((75 / 1e2), 0) ELSE coalesce((CAST(8833983884457511 AS REAL) / 9007199254740992), 0) END END END) / 3.0e0 END AS "__t2s_p1",
  CASE WHEN "__t2s_ok" = 1 THEN (CASE WHEN "__t2s_f0" <= coalesce((5450000047683716 / 1e15), 0) THEN CASE WHEN "__t2s_f1" <= coalesce((2850000023841858 / 1e15), 0) THEN 0.0e0 ELSE 0.0e0 END ELSE CASE WHEN "__t2s_f0" <= coalesce((6049999952316283 / 1e15), 0) THEN CASE WHEN "__t2s_f2" > coalesce((4850000143051147 / 1e15), 0) THEN 1.0e0 ELSE 0.0e0 END ELSE CASE WHEN "__t2s_f2" <= coalesce((4799999952316283 / 1e15), 0) THEN 0.0e0 ELSE coalesce((CAST(4289142502257615 AS REAL) / 4503599627370496), 0) END END END
    + CASE WHEN "__t2s_f0" <= coalesce((5549999952316283 / 1e15), 0) THEN CASE WHEN "__t2s_f2" > coalesce((CAST(20552089 AS REAL) / 8388608), 0) THEN CASE WHEN "__t2s_f3" > coalesce((CAST(7205759779602431 AS REAL) / 4503599627370496), 0) THEN 1.0e0 ELSE 0.0e0 END ELSE 0.0e0 END ELSE CASE WHEN "__t2s_f3" <= coalesce((CAST(7656119312842751 AS REAL) / 4503599627370496), 0) THEN CASE WHEN "__t2s_f2" > coalesce((5000000238418579 / 1e15), 0) THEN 1.0e0 ELSE 0.0e0 END ELSE CASE WHEN "__t2s_f2" <= coalesce((4850000143051147 / 1e15), 0) THEN coalesce((8 / 1e1), 0) ELSE 1.0e0 END END END
    + CASE WHEN "__t2s_f3" <= coalesce((7500000298023224 / 1e16), 0) THEN 0.0e0 ELSE CASE WHEN "__t2s_f3" > coalesce((CAST(7430939546222591 AS REAL) / 4503599627370496), 0) THEN CASE WHEN "__t2s_f2" <= coalesce((4850000143051147 / 1e15), 0) THEN coalesce((5 / 1e1), 0) ELSE coalesce((975 / 1e3), 0) END ELSE CASE WHEN "__t2s_f3" > coalesce((1550000011920929 / 1e15), 0) THEN coalesce((25 / 1e2), 0) ELSE coalesce((CAST(1385722962267845 AS REAL) / 72057594037927936), 0) END END END) / 3.0e0 END AS "__t2s_p2"
FROM "__t2s_checked"
)
SELECT "row id",
  "__t2s_p0" AS "score_prob_0",
  "__t2s_p1" AS "score_prob_1",
  "__t2s_p2" AS "score_prob_2",
  CASE WHEN "__t2s_p0" IS NULL THEN NULL WHEN "__t2s_p0" >= "__t2s_p1" AND "__t2s_p0" >= "__t2s_p2" THEN 0 WHEN "__t2s_p1" >= "__t2s_p2" THEN 1 ELSE 2 END AS "score_class"
FROM "__t2s_scores"
