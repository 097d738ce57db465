SET jit = off;

SET parallel_leader_participation = off;

SET enable_mergejoin = off;

SET parallel_tuple_cost = 0;

DROP TABLE IF EXISTS "__t2s_model_33dc85aced683fe4";

CREATE TABLE "__t2s_model_33dc85aced683fe4" ("tree" INTEGER, "node" INTEGER, "feature" INTEGER, "bound" DOUBLE PRECISION, "next_left" INTEGER, "next_right" INTEGER, "next_missing" INTEGER, "value_0" DOUBLE PRECISION, "value_1" DOUBLE PRECISION, "value_2" DOUBLE PRECISION);

INSERT INTO "__t2s_model_33dc85aced683fe4" ("tree", "node", "feature", "bound", "next_left", "next_right", "next_missing", "value_0", "value_1", "value_2") VALUES
(0, 0, 0, CAST(5.450000047683716e0 AS DOUBLE PRECISION), 1, 4, 4, CAST(0.32666666666666666e0 AS DOUBLE PRECISION), CAST(0.35333333333333333e0 AS DOUBLE PRECISION), CAST(0.32e0 AS DOUBLE PRECISION)),
(0, 1, 1, CAST(2.850000023841858e0 AS DOUBLE PRECISION), 2, 3, 3, CAST(0.8461538461538461e0 AS DOUBLE PRECISION), CAST(0.15384615384615385e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION)),
(0, 2, -1, CAST(0.0e0 AS DOUBLE PRECISION), 2, 2, 2, CAST(0.0e0 AS DOUBLE PRECISION), CAST(1.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION)),
(0, 3, -1, CAST(0.0e0 AS DOUBLE PRECISION), 3, 3, 3, CAST(1.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION)),
(0, 4, 0, CAST(6.049999952316283e0 AS DOUBLE PRECISION), 5, 8, 8, CAST(0.05102040816326531e0 AS DOUBLE PRECISION), CAST(0.45918367346938777e0 AS DOUBLE PRECISION), CAST(0.4897959183673469e0 AS DOUBLE PRECISION)),
(0, 5, 2, CAST(4.850000143051147e0 AS DOUBLE PRECISION), 6, 7, 6, CAST(0.11627906976744186e0 AS DOUBLE PRECISION), CAST(0.6976744186046512e0 AS DOUBLE PRECISION), CAST(0.18604651162790697e0 AS DOUBLE PRECISION)),
(0, 6, -1, CAST(0.0e0 AS DOUBLE PRECISION), 6, 6, 6, CAST(0.14285714285714285e0 AS DOUBLE PRECISION), CAST(0.8571428571428571e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION)),
(0, 7, -1, CAST(0.0e0 AS DOUBLE PRECISION), 7, 7, 7, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION), CAST(1.0e0 AS DOUBLE PRECISION)),
(0, 8, 2, CAST(4.799999952316283e0 AS DOUBLE PRECISION), 9, 10, 10, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.2727272727272727e0 AS DOUBLE PRECISION), CAST(0.7272727272727273e0 AS DOUBLE PRECISION)),
(0, 9, -1, CAST(0.0e0 AS DOUBLE PRECISION), 9, 9, 9, CAST(0.0e0 AS DOUBLE PRECISION), CAST(1.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION)),
(0, 10, -1, CAST(0.0e0 AS DOUBLE PRECISION), 10, 10, 10, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.047619047619047616e0 AS DOUBLE PRECISION), CAST(0.9523809523809523e0 AS DOUBLE PRECISION)),
(1, 0, 0, CAST(5.549999952316283e0 AS DOUBLE PRECISION), 1, 6, 6, CAST(0.32666666666666666e0 AS DOUBLE PRECISION), CAST(0.32e0 AS DOUBLE PRECISION), CAST(0.35333333333333333e0 AS DOUBLE PRECISION)),
(1, 1, 2, CAST(2.4499999284744263e0 AS DOUBLE PRECISION), 2, 3, 2, CAST(0.765625e0 AS DOUBLE PRECISION), CAST(0.171875e0 AS DOUBLE PRECISION), CAST(0.0625e0 AS DOUBLE PRECISION)),
(1, 2, -1, CAST(0.0e0 AS DOUBLE PRECISION), 2, 2, 2, CAST(1.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION)),
(1, 3, 3, CAST(1.6000000834465025e0 AS DOUBLE PRECISION), 4, 5, 4, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.7333333333333333e0 AS DOUBLE PRECISION), CAST(0.26666666666666666e0 AS DOUBLE PRECISION)),
(1, 4, -1, CAST(0.0e0 AS DOUBLE PRECISION), 4, 4, 4, CAST(0.0e0 AS DOUBLE PRECISION), CAST(1.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION)),
(1, 5, -1, CAST(0.0e0 AS DOUBLE PRECISION), 5, 5, 5, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION), CAST(1.0e0 AS DOUBLE PRECISION)),
(1, 6, 3, CAST(1.6999999880790708e0 AS DOUBLE PRECISION), 7, 10, 10, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.43023255813953487e0 AS DOUBLE PRECISION), CAST(0.5697674418604651e0 AS DOUBLE PRECISION)),
(1, 7, 2, CAST(5.000000238418579e0 AS DOUBLE PRECISION), 8, 9, 8, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.9230769230769231e0 AS DOUBLE PRECISION), CAST(0.07692307692307693e0 AS DOUBLE PRECISION)),
(1, 8, -1, CAST(0.0e0 AS DOUBLE PRECISION), 8, 8, 8, CAST(0.0e0 AS DOUBLE PRECISION), CAST(1.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION)),
(1, 9, -1, CAST(0.0e0 AS DOUBLE PRECISION), 9, 9, 9, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION), CAST(1.0e0 AS DOUBLE PRECISION)),
(1, 10, 2, CAST(4.850000143051147e0 AS DOUBLE PRECISION), 11, 12, 12, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.02127659574468085e0 AS DOUBLE PRECISION), CAST(0.9787234042553191e0 AS DOUBLE PRECISION)),
(1, 11, -1, CAST(0.0e0 AS DOUBLE PRECISION), 11, 11, 11, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.2e0 AS DOUBLE PRECISION), CAST(0.8e0 AS DOUBLE PRECISION)),
(1, 12, -1, CAST(0.0e0 AS DOUBLE PRECISION), 12, 12, 12, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION), CAST(1.0e0 AS DOUBLE PRECISION)),
(2, 0, 3, CAST(0.7500000298023224e0 AS DOUBLE PRECISION), 1, 2, 2, CAST(0.3333333333333333e0 AS DOUBLE PRECISION), CAST(0.38e0 AS DOUBLE PRECISION), CAST(0.2866666666666667e0 AS DOUBLE PRECISION)),
(2, 1, -1, CAST(0.0e0 AS DOUBLE PRECISION), 1, 1, 1, CAST(1.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.0e0 AS DOUBLE PRECISION)),
(2, 2, 3, CAST(1.6500000357627866e0 AS DOUBLE PRECISION), 3, 6, 3, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.57e0 AS DOUBLE PRECISION), CAST(0.43e0 AS DOUBLE PRECISION)),
(2, 3, 3, CAST(1.550000011920929e0 AS DOUBLE PRECISION), 4, 5, 4, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.9642857142857143e0 AS DOUBLE PRECISION), CAST(0.03571428571428571e0 AS DOUBLE PRECISION)),
(2, 4, -1, CAST(0.0e0 AS DOUBLE PRECISION), 4, 4, 4, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.9807692307692307e0 AS DOUBLE PRECISION), CAST(0.019230769230769232e0 AS DOUBLE PRECISION)),
(2, 5, -1, CAST(0.0e0 AS DOUBLE PRECISION), 5, 5, 5, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.75e0 AS DOUBLE PRECISION), CAST(0.25e0 AS DOUBLE PRECISION)),
(2, 6, 2, CAST(4.850000143051147e0 AS DOUBLE PRECISION), 7, 8, 8, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.06818181818181818e0 AS DOUBLE PRECISION), CAST(0.9318181818181818e0 AS DOUBLE PRECISION)),
(2, 7, -1, CAST(0.0e0 AS DOUBLE PRECISION), 7, 7, 7, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.5e0 AS DOUBLE PRECISION), CAST(0.5e0 AS DOUBLE PRECISION)),
(2, 8, -1, CAST(0.0e0 AS DOUBLE PRECISION), 8, 8, 8, CAST(0.0e0 AS DOUBLE PRECISION), CAST(0.025e0 AS DOUBLE PRECISION), CAST(0.975e0 AS DOUBLE PRECISION));

ANALYZE "__t2s_model_33dc85aced683fe4";

-- tree2sql 0.1.0: scikit-learn RandomForestClassifier (3 trees)
-- model fingerprint sha256:33dc85aced683fe47dfbfed29c8abc7e1037fbb1e15363e2c71b6d56eb7d3ebb
-- dialect postgres, strategy model_table, combine average
-- Scores can decide things about people: verify this SQL against the model (tree2sql verify) before use, keep model and SQL under review, and follow your organisation's model-risk practice and local rules.
WITH "__t2s_input" AS (
SELECT "row id",
  NULLIF(CAST("x0" AS DOUBLE PRECISION), CAST('NaN' AS DOUBLE PRECISION)) AS "__t2s_f0",
  NULLIF(CAST("x1" AS DOUBLE PRECISION), CAST('NaN' AS DOUBLE PRECISION)) AS "__t2s_f1",
  NULLIF(CAST("x2" AS DOUBLE PRECISION), CAST('NaN' AS DOUBLE PRECISION)) AS "__t2s_f2",
  NULLIF(CAST("x3" AS DOUBLE PRECISION), CAST('NaN' AS DOUBLE PRECISION)) AS "__t2s_f3"
FROM "sales"."iris rows"
),
"__t2s_checked" AS (
SELECT "__t2s_input".*, CASE WHEN ABS("__t2s_f0") >= CAST(3.4028235677973366e+38 AS DOUBLE PRECISION) OR ABS("__t2s_f1") >= CAST(3.4028235677973366e+38 AS DOUBLE PRECISION) OR ABS("__t2s_f2") >= CAST(3.4028235677973366e+38 AS DOUBLE PRECISION) OR ABS("__t2s_f3") >= CAST(3.4028235677973366e+38 AS DOUBLE PRECISION) THEN 0 ELSE 1 END AS "__t2s_ok"
FROM "__t2s_input"
),
"__t2s_numbered" AS (
SELECT ROW_NUMBER() OVER () AS "__t2s_rid", "row id", "__t2s_ok", "__t2s_f0", "__t2s_f1", "__t2s_f2", "__t2s_f3"
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
WITH "__t2s_fence" AS (SELECT 1)
SELECT "row id",
  CASE WHEN "__t2s_ok" = 1 THEN ("__t2s_v0_0"
    + "__t2s_v1_0"
    + "__t2s_v2_0") / CAST(3.0e0 AS DOUBLE PRECISION) END AS "__t2s_p0",
  CASE WHEN "__t2s_ok" = 1 THEN ("__t2s_v0_1"
    + "__t2s_v1_1"
    + "__t2s_v2_1") / CAST(3.0e0 AS DOUBLE PRECISION) END AS "__t2s_p1",
  CASE WHEN "__t2s_ok" = 1 THEN ("__t2s_v0_2"
    + "__t2s_v1_2"
    + "__t2s_v2_2") / CAST(3.0e0 AS DOUBLE PRECISION) END AS "__t2s_p2"
FROM "__t2s_pivot"
)
SELECT "row id",
  "__t2s_p0" AS "score_prob_0",
  "__t2s_p1" AS "score_prob_1",
  "__t2s_p2" AS "score_prob_2",
  CASE WHEN "__t2s_p0" IS NULL THEN NULL WHEN "__t2s_p0" >= "__t2s_p1" AND "__t2s_p0" >= "__t2s_p2" THEN 0 WHEN "__t2s_p1" >= "__t2s_p2" THEN 1 ELSE 2 END AS "score_class"
FROM "__t2s_scores"
