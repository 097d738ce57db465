SET max_query_size = 1073741824;

SET max_ast_elements = 10000000;

SET max_expanded_ast_elements = 10000000;

SET query_plan_merge_expressions = 0;

SET compile_expressions = 0;

DROP TABLE IF EXISTS "__t2s_model_33dc85aced683fe4";

CREATE TABLE "__t2s_model_33dc85aced683fe4" ("tree" Int64, "node" Int64, "feature" Int64, "bound" Nullable(Float64), "next_left" Int64, "next_right" Int64, "next_missing" Int64, "value_0" Nullable(Float64), "value_1" Nullable(Float64), "value_2" Nullable(Float64)) ENGINE = MergeTree ORDER BY tuple();

INSERT INTO "__t2s_model_33dc85aced683fe4" ("tree", "node", "feature", "bound", "next_left", "next_right", "next_missing", "value_0", "value_1", "value_2") VALUES
(0, 0, 0, 5.450000047683716e0, 1, 4, 4, 0.32666666666666666e0, 0.35333333333333333e0, 0.32e0),
(0, 1, 1, 2.850000023841858e0, 2, 3, 3, 0.8461538461538461e0, 0.15384615384615385e0, 0.0e0),
(0, 2, -1, 0.0e0, 2, 2, 2, 0.0e0, 1.0e0, 0.0e0),
(0, 3, -1, 0.0e0, 3, 3, 3, 1.0e0, 0.0e0, 0.0e0),
(0, 4, 0, 6.049999952316283e0, 5, 8, 8, 0.05102040816326531e0, 0.45918367346938777e0, 0.4897959183673469e0),
(0, 5, 2, 4.850000143051147e0, 6, 7, 6, 0.11627906976744186e0, 0.6976744186046512e0, 0.18604651162790697e0),
(0, 6, -1, 0.0e0, 6, 6, 6, 0.14285714285714285e0, 0.8571428571428571e0, 0.0e0),
(0, 7, -1, 0.0e0, 7, 7, 7, 0.0e0, 0.0e0, 1.0e0),
(0, 8, 2, 4.799999952316283e0, 9, 10, 10, 0.0e0, 0.2727272727272727e0, 0.7272727272727273e0),
(0, 9, -1, 0.0e0, 9, 9, 9, 0.0e0, 1.0e0, 0.0e0),
(0, 10, -1, 0.0e0, 10, 10, 10, 0.0e0, 0.047619047619047616e0, 0.9523809523809523e0),
(1, 0, 0, 5.549999952316283e0, 1, 6, 6, 0.32666666666666666e0, 0.32e0, 0.35333333333333333e0),
(1, 1, 2, 2.4499999284744263e0, 2, 3, 2, 0.765625e0, 0.171875e0, 0.0625e0),
(1, 2, -1, 0.0e0, 2, 2, 2, 1.0e0, 0.0e0, 0.0e0),
(1, 3, 3, 1.6000000834465025e0, 4, 5, 4, 0.0e0, 0.7333333333333333e0, 0.26666666666666666e0),
(1, 4, -1, 0.0e0, 4, 4, 4, 0.0e0, 1.0e0, 0.0e0),
(1, 5, -1, 0.0e0, 5, 5, 5, 0.0e0, 0.0e0, 1.0e0),
(1, 6, 3, 1.6999999880790708e0, 7, 10, 10, 0.0e0, 0.43023255813953487e0, 0.5697674418604651e0),
(1, 7, 2, 5.000000238418579e0, 8, 9, 8, 0.0e0, 0.9230769230769231e0, 0.07692307692307693e0),
(1, 8, -1, 0.0e0, 8, 8, 8, 0.0e0, 1.0e0, 0.0e0),
(1, 9, -1, 0.0e0, 9, 9, 9, 0.0e0, 0.0e0, 1.0e0),
(1, 10, 2, 4.850000143051147e0, 11, 12, 12, 0.0e0, 0.02127659574468085e0, 0.9787234042553191e0),
(1, 11, -1, 0.0e0, 11, 11, 11, 0.0e0, 0.2e0, 0.8e0),
(1, 12, -1, 0.0e0, 12, 12, 12, 0.0e0, 0.0e0, 1.0e0),
(2, 0, 3, 0.7500000298023224e0, 1, 2, 2, 0.3333333333333333e0, 0.38e0, 0.2866666666666667e0),
(2, 1, -1, 0.0e0, 1, 1, 1, 1.0e0, 0.0e0, 0.0e0),
(2, 2, 3, 1.6500000357627866e0, 3, 6, 3, 0.0e0, 0.57e0, 0.43e0),
(2, 3, 3, 1.550000011920929e0, 4, 5, 4, 0.0e0, 0.9642857142857143e0, 0.03571428571428571e0),
(2, 4, -1, 0.0e0, 4, 4, 4, 0.0e0, 0.9807692307692307e0, 0.019230769230769232e0),
(2, 5, -1, 0.0e0, 5, 5, 5, 0.0e0, 0.75e0, 0.25e0),
(2, 6, 2, 4.850000143051147e0, 7, 8, 8, 0.0e0, 0.06818181818181818e0, 0.9318181818181818e0),
(2, 7, -1, 0.0e0, 7, 7, 7, 0.0e0, 0.5e0, 0.5e0),
(2, 8, -1, 0.0e0, 8, 8, 8, 0.0e0, 0.025e0, 0.975e0);

-- tree2sql 0.1.0: scikit-learn RandomForestClassifier (3 trees)
-- model fingerprint sha256:33dc85aced683fe47dfbfed29c8abc7e1037fbb1e15363e2c71b6d56eb7d3ebb
-- dialect clickhouse, strategy model_table, combine average
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
"__t2s_numbered" AS (
SELECT rowNumberInAllBlocks() AS "__t2s_rid", "row id", "__t2s_ok", "__t2s_f0", "__t2s_f1", "__t2s_f2", "__t2s_f3"
FROM "__t2s_checked"
),
"__t2s_walk0" AS (
SELECT "w"."__t2s_rid", "w"."row id", "w"."__t2s_ok", "w"."__t2s_f0", "w"."__t2s_f1", "w"."__t2s_f2", "w"."__t2s_f3", "m"."tree" AS "__t2s_tree", "m"."node" AS "__t2s_node"
FROM "__t2s_numbered" "w" CROSS JOIN "__t2s_model_33dc85aced683fe4" "m"
WHERE "m"."node" = 0
),
"__t2s_fetch1" AS (
SELECT "w"."__t2s_rid", "w"."row id", "w"."__t2s_ok", "w"."__t2s_f0", "w"."__t2s_f1", "w"."__t2s_f2", "w"."__t2s_f3", "w"."__t2s_tree", "m"."next_missing" AS "__t2s_next_missing", "m"."next_left" AS "__t2s_next_left", "m"."next_right" AS "__t2s_next_right", "m"."bound" AS "__t2s_bound", CASE "m"."feature" WHEN 0 THEN "w"."__t2s_f0" WHEN 1 THEN "w"."__t2s_f1" WHEN 2 THEN "w"."__t2s_f2" WHEN 3 THEN "w"."__t2s_f3" END AS "__t2s_x"
FROM "__t2s_walk0" "w"
JOIN "__t2s_model_33dc85aced683fe4" "m" ON "m"."tree" = "w"."__t2s_tree" AND "m"."node" = "w"."__t2s_node"
),
"__t2s_walk1" AS (
SELECT "__t2s_rid", "row id", "__t2s_ok", "__t2s_f0", "__t2s_f1", "__t2s_f2", "__t2s_f3", "__t2s_tree", CASE WHEN "__t2s_x" IS NULL THEN "__t2s_next_missing" WHEN "__t2s_x" <= "__t2s_bound" THEN "__t2s_next_left" ELSE "__t2s_next_right" END AS "__t2s_node"
FROM "__t2s_fetch1"
),
"__t2s_fetch2" AS (
SELECT "w"."__t2s_rid", "w"."row id", "w"."__t2s_ok", "w"."__t2s_f0", "w"."__t2s_f1", "w"."__t2s_f2", "w"."__t2s_f3", "w"."__t2s_tree", "m"."next_missing" AS "__t2s_next_missing", "m"."next_left" AS "__t2s_next_left", "m"."next_right" AS "__t2s_next_right", "m"."bound" AS "__t2s_bound", CASE "m"."feature" WHEN 0 THEN "w"."__t2s_f0" WHEN 1 THEN "w"."__t2s_f1" WHEN 2 THEN "w"."__t2s_f2" WHEN 3 THEN "w"."__t2s_f3" END AS "__t2s_x"
FROM "__t2s_walk1" "w"
JOIN "__t2s_model_33dc85aced683fe4" "m" ON "m"."tree" = "w"."__t2s_tree" AND "m"."node" = "w"."__t2s_node"
),
"__t2s_walk2" AS (
SELECT "__t2s_rid", "row id", "__t2s_ok", "__t2s_f0", "__t2s_f1", "__t2s_f2", "__t2s_f3", "__t2s_tree", CASE WHEN "__t2s_x" IS NULL THEN "__t2s_next_missing" WHEN "__t2s_x" <= "__t2s_bound" THEN "__t2s_next_left" ELSE "__t2s_next_right" END AS "__t2s_node"
FROM "__t2s_fetch2"
),
"__t2s_fetch3" AS (
SELECT "w"."__t2s_rid", "w"."row id", "w"."__t2s_ok", "w"."__t2s_f0", "w"."__t2s_f1", "w"."__t2s_f2", "w"."__t2s_f3", "w"."__t2s_tree", "m"."next_missing" AS "__t2s_next_missing", "m"."next_left" AS "__t2s_next_left", "m"."next_right" AS "__t2s_next_right", "m"."bound" AS "__t2s_bound", CASE "m"."feature" WHEN 0 THEN "w"."__t2s_f0" WHEN 1 THEN "w"."__t2s_f1" WHEN 2 THEN "w"."__t2s_f2" WHEN 3 THEN "w"."__t2s_f3" END AS "__t2s_x"
FROM "__t2s_walk2" "w"
JOIN "__t2s_model_33dc85aced683fe4" "m" ON "m"."tree" = "w"."__t2s_tree" AND "m"."node" = "w"."__t2s_node"
),
"__t2s_walk3" AS (
SELECT "__t2s_rid", "row id", "__t2s_ok", "__t2s_f0", "__t2s_f1", "__t2s_f2", "__t2s_f3", "__t2s_tree", CASE WHEN "__t2s_x" IS NULL THEN "__t2s_next_missing" WHEN "__t2s_x" <= "__t2s_bound" THEN "__t2s_next_left" ELSE "__t2s_next_right" END AS "__t2s_node"
FROM "__t2s_fetch3"
),
"__t2s_leaves" AS (
SELECT "w"."__t2s_rid", "w"."row id", "w"."__t2s_ok", "w"."__t2s_tree", "w"."__t2s_node", "m"."value_0" AS "__t2s_value_0", "m"."value_1" AS "__t2s_value_1", "m"."value_2" AS "__t2s_value_2"
FROM "__t2s_walk3" "w"
JOIN "__t2s_model_33dc85aced683fe4" "m" ON "m"."tree" = "w"."__t2s_tree" AND "m"."node" = "w"."__t2s_node"
),
"__t2s_pivot" AS (
SELECT "row id",
  "__t2s_ok",
  MAX(CASE WHEN "__t2s_tree" = 0 THEN "__t2s_node" END) AS "__t2s_n0",
  MAX(CASE WHEN "__t2s_tree" = 0 THEN "__t2s_value_0" END) AS "__t2s_v0_0",
  MAX(CASE WHEN "__t2s_tree" = 0 THEN "__t2s_value_1" END) AS "__t2s_v0_1",
  MAX(CASE WHEN "__t2s_tree" = 0 THEN "__t2s_value_2" END) AS "__t2s_v0_2",
  MAX(CASE WHEN "__t2s_tree" = 1 THEN "__t2s_node" END) AS "__t2s_n1",
  MAX(CASE WHEN "__t2s_tree" = 1 THEN "__t2s_value_0" END) AS "__t2s_v1_0",
  MAX(CASE WHEN "__t2s_tree" = 1 THEN "__t2s_value_1" END) AS "__t2s_v1_1",
  MAX(CASE WHEN "__t2s_tree" = 1 THEN "__t2s_value_2" END) AS "__t2s_v1_2",
  MAX(CASE WHEN "__t2s_tree" = 2 THEN "__t2s_node" END) AS "__t2s_n2",
  MAX(CASE WHEN "__t2s_tree" = 2 THEN "__t2s_value_0" END) AS "__t2s_v2_0",
  MAX(CASE WHEN "__t2s_tree" = 2 THEN "__t2s_value_1" END) AS "__t2s_v2_1",
  MAX(CASE WHEN "__t2s_tree" = 2 THEN "__t2s_value_2" END) AS "__t2s_v2_2"
FROM "__t2s_leaves"
GROUP BY "__t2s_rid", "row id", "__t2s_ok"
),
"__t2s_scores" AS (
SELECT "row id",
  ("__t2s_v0_0"
    + "__t2s_v1_0"
    + "__t2s_v2_0") / 3.0e0 * nullIf("__t2s_ok", 0) AS "__t2s_p0",
  ("__t2s_v0_1"
    + "__t2s_v1_1"
    + "__t2s_v2_1") / 3.0e0 * nullIf("__t2s_ok", 0) AS "__t2s_p1",
  ("__t2s_v0_2"
    + "__t2s_v1_2"
    + "__t2s_v2_2") / 3.0e0 * nullIf("__t2s_ok", 0) AS "__t2s_p2"
FROM "__t2s_pivot"
)
SELECT "row id",
  "__t2s_p0" AS "score_prob_0",
  "__t2s_p1" AS "score_prob_1",
  "__t2s_p2" AS "score_prob_2",
  CASE WHEN "__t2s_p0" IS NULL THEN NULL WHEN "__t2s_p0" >= "__t2s_p1" AND "__t2s_p0" >= "__t2s_p2" THEN 0 WHEN "__t2s_p1" >= "__t2s_p2" THEN 1 ELSE 2 END AS "score_class"
FROM "__t2s_scores"
