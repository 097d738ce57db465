SET max_query_size = 1073741824;

SET max_ast_elements = 10000000;

SET max_expanded_ast_elements = 10000000;

SET query_plan_merge_expressions = 0;

SET compile_expressions = 0;

-- tree2sql 0.1.0: scikit-learn RandomForestClassifier (3 trees)
-- model fingerprint sha256:33dc85aced683fe47dfbfed29c8abc7e1037fbb1e15363e2c71b6d56eb7d3ebb
-- dialect clickhouse, strategy depth_staged, combine average
-- Scores can decide things about people: verify this SQL against the model (tree2sql verify) before use, keep model and SQL under review, and follow your organisation's model-risk practice and local rules.
WITH "__t2s_input" AS (
SELECT "row id",
  if(isNaN(CAST("x0" AS Nullable(Float64))), NULL, CAST("x0" AS Nullable(Float64))) AS "__t2s_f0",
  if(isNaN(CAST("x1" AS Nullable(Float64))), NULL, CAST("x1" AS Nullable(Float64))) AS "__t2s_f1",
  if(isNaN(CAST("x2" AS Nullable(Float64))), NULL, CAST("x2" AS Nullable(Float64))) AS "__t2s_f2",
  if(isNaN(CAST("x3" AS Nullable(Float64))), NULL, CAST("x3" AS Nullable(Float64))) AS "__t2s_f3"
FROM "sales"."iris rows"
),
"__t2s_checked" AS (
SELECT "__t2s_input".*, CASE WHEN ABS("__t2s_f0") >= 3.4028235677973366e+38 OR ABS("__t2s_f1") >= 3.4028235677973366e+38 OR ABS("__t2s_f2") >= 3.4028235677973366e+38 OR ABS("__t2s_f3") >= 3.4028235677973366e+38 THEN 0 ELSE 1 END AS "__t2s_ok"
FROM "__t2s_input"
),
"__t2s_level0" AS (
SELECT "row id",
  "__t2s_ok",
  "__t2s_f0",
  "__t2s_f1",
  "__t2s_f2",
  "__t2s_f3",
  CASE WHEN "__t2s_f0" <= 5.450000047683716e0 THEN CASE WHEN "__t2s_f1" <= 2.850000023841858e0 THEN 2 ELSE 3 END ELSE CASE WHEN "__t2s_f0" <= 6.049999952316283e0 THEN CASE WHEN "__t2s_f2" > 4.850000143051147e0 THEN 7 ELSE 6 END ELSE CASE WHEN "__t2s_f2" <= 4.799999952316283e0 THEN 9 ELSE 10 END END END AS "__t2s_n0",
  CASE WHEN "__t2s_f0" <= 5.549999952316283e0 THEN CASE WHEN "__t2s_f2" > 2.4499999284744263e0 THEN CASE WHEN "__t2s_f3" > 1.6000000834465025e0 THEN 5 ELSE 4 END ELSE 2 END ELSE CASE WHEN "__t2s_f3" <= 1.6999999880790708e0 THEN CASE WHEN "__t2s_f2" > 5.000000238418579e0 THEN 9 ELSE 8 END ELSE CASE WHEN "__t2s_f2" <= 4.850000143051147e0 THEN 11 ELSE 12 END END END AS "__t2s_n1",
  CASE WHEN "__t2s_f3" <= 0.7500000298023224e0 THEN 1 ELSE CASE WHEN "__t2s_f3" > 1.6500000357627866e0 THEN CASE WHEN "__t2s_f2" <= 4.850000143051147e0 THEN 7 ELSE 8 END ELSE CASE WHEN "__t2s_f3" > 1.550000011920929e0 THEN 5 ELSE 4 END END END AS "__t2s_n2"
FROM "__t2s_checked"
),
"__t2s_scores" AS (
SELECT "row id",
  (CASE "__t2s_n0" WHEN 2 THEN 0.0e0 WHEN 3 THEN 1.0e0 WHEN 6 THEN 0.14285714285714285e0 WHEN 7 THEN 0.0e0 WHEN 9 THEN 0.0e0 WHEN 10 THEN 0.0e0 END
    + CASE "__t2s_n1" WHEN 2 THEN 1.0e0 WHEN 4 THEN 0.0e0 WHEN 5 THEN 0.0e0 WHEN 8 THEN 0.0e0 WHEN 9 THEN 0.0e0 WHEN 11 THEN 0.0e0 WHEN 12 THEN 0.0e0 END
    + CASE "__t2s_n2" WHEN 1 THEN 1.0e0 WHEN 4 THEN 0.0e0 WHEN 5 THEN 0.0e0 WHEN 7 THEN 0.0e0 WHEN 8 THEN 0.0e0 END) / 3.0e0 * nullIf("__t2s_ok", 0) AS "__t2s_p0",
  (CASE "__t2s_n0" WHEN 2 THEN 1.0e0 WHEN 3 THEN 0.0e0 WHEN 6 THEN 0.8571428571428571e0 WHEN 7 THEN 0.0e0 WHEN 9 THEN 1.0e0 WHEN 10 THEN 0.047619047619047616e0 END
    + CASE "__t2s_n1" WHEN 2 THEN 0.0e0 WHEN 4 THEN 1.0e0 WHEN 5 THEN 0.0e0 WHEN 8 THEN 1.0e0 WHEN 9 THEN 0.0e0 WHEN 11 THEN 0.2e0 WHEN 12 THEN 0.0e0 END
    + CASE "__t2s_n2" WHEN 1 THEN 0.0e0 WHEN 4 THEN 0.9807692307692307e0 WHEN 5 THEN 0.75e0 WHEN 7 THEN 0.5e0 WHEN 8 THEN 0.025e0 END) / 3.0e0 * nullIf("__t2s_ok", 0) AS "__t2s_p1",
  (CASE "__t2s_n0" WHEN 2 THEN 0.0e0 WHEN 3 THEN 0.0e0 WHEN 6 THEN 0.0e0 WHEN 7 THEN 1.0e0 WHEN 9 THEN 0.0e0 WHEN 10 THEN 0.9523809523809523e0 END
    + CASE "__t2s_n1" WHEN 2 THEN 0.0e0 WHEN 4 THEN 0.0e0 WHEN 5 THEN 1.0e0 WHEN 8 THEN 0.0e0 WHEN 9 THEN 1.0e0 WHEN 11 THEN 0.8e0 WHEN 12 THEN 1.0e0 END
    + CASE "__t2s_n2" WHEN 1 THEN 0.0e0 WHEN 4 THEN 0.019230769230769232e0 WHEN 5 THEN 0.25e0 WHEN 7 THEN 0.5e0 WHEN 8 THEN 0.975e0 END) / 3.0e0 * nullIf("__t2s_ok", 0) AS "__t2s_p2"
FROM "__t2s_level0"
)
SELECT "row id",
  "__t2s_p0" AS "score_prob_0",
  "__t2s_p1" AS "score_prob_1",
  "__t2s_p2" AS "score_prob_2",
  CASE WHEN "__t2s_p0" IS NULL THEN NULL WHEN "__t2s_p0" >= "__t2s_p1" AND "__t2s_p0" >= "__t2s_p2" THEN 0 WHEN "__t2s_p1" >= "__t2s_p2" THEN 1 ELSE 2 END AS "score_class"
FROM "__t2s_scores"
