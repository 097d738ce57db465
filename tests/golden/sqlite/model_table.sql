DROP TABLE IF EXISTS "__t2s_model_33dc85aced683fe4";

CREATE TABLE "__t2s_model_33dc85aced683fe4" ("tree" INTEGER, "node" INTEGER, "feature" INTEGER, "bound" REAL, "next_left" INTEGER, "next_right" INTEGER, "next_missing" INTEGER, "value_0" REAL, "value_1" REAL, "value_2" REAL);

INSERT INTO "__t2s_model_33dc85aced683fe4" ("tree", "node", "feature", "bound", "next_left", "next_right", "next_missing", "value_0", "value_1", "value_2") VALUES
(0, 0, 0, coalesce((5450000047683716 / 1e15), 0), 1, 4, 4, coalesce((CAST(735587939137181 AS REAL) / 2251799813685248), 0), coalesce((CAST(6365087473350301 AS REAL) / 18014398509481984), 0), coalesce((32 / 1e2), 0)),
(0, 1, 1, coalesce((2850000023841858 / 1e15), 0), 2, 3, 3, coalesce((8461538461538461 / 1e16), 0), coalesce((CAST(1385722962267845 AS REAL) / 9007199254740992), 0), 0.0e0),
(0, 2, -1, 0.0e0, 2, 2, 2, 0.0e0, 1.0e0, 0.0e0),
(0, 3, -1, 0.0e0, 3, 3, 3, 1.0e0, 0.0e0, 0.0e0),
(0, 4, 0, coalesce((6049999952316283 / 1e15), 0), 5, 8, 8, coalesce((5102040816326531 / 1e17), 0), coalesce((CAST(8271917682925401 AS REAL) / 18014398509481984), 0), coalesce((4897959183673469 / 1e16), 0)),
(0, 5, 2, coalesce((4850000143051147 / 1e15), 0), 6, 7, 6, coalesce((CAST(8378790004410225 AS REAL) / 72057594037927936), 0), coalesce((6976744186046512 / 1e16), 0), coalesce((CAST(1675758000882045 AS REAL) / 9007199254740992), 0)),
(0, 6, -1, 0.0e0, 6, 6, 6, coalesce((CAST(2573485501354569 AS REAL) / 18014398509481984), 0), coalesce((8571428571428571 / 1e16), 0), 0.0e0),
(0, 7, -1, 0.0e0, 7, 7, 7, 0.0e0, 0.0e0, 1.0e0),
(0, 8, 2, coalesce((4799999952316283 / 1e15), 0), 9, 10, 10, 0.0e0, coalesce((2727272727272727 / 1e16), 0), coalesce((7272727272727273 / 1e16), 0)),
(0, 9, -1, 0.0e0, 9, 9, 9, 0.0e0, 1.0e0, 0.0e0),
(0, 10, -1, 0.0e0, 10, 10, 10, 0.0e0, coalesce((CAST(857828500451523 AS REAL) / 18014398509481984), 0), coalesce((CAST(4289142502257615 AS REAL) / 4503599627370496), 0)),
(1, 0, 0, coalesce((5549999952316283 / 1e15), 0), 1, 6, 6, coalesce((CAST(735587939137181 AS REAL) / 2251799813685248), 0), coalesce((32 / 1e2), 0), coalesce((CAST(6365087473350301 AS REAL) / 18014398509481984), 0)),
(1, 1, 2, coalesce((CAST(20552089 AS REAL) / 8388608), 0), 2, 3, 2, coalesce((765625 / 1e6), 0), coalesce((171875 / 1e6), 0), coalesce((625 / 1e4), 0)),
(1, 2, -1, 0.0e0, 2, 2, 2, 1.0e0, 0.0e0, 0.0e0),
(1, 3, 3, coalesce((CAST(7205759779602431 AS REAL) / 4503599627370496), 0), 4, 5, 4, 0.0e0, coalesce((7333333333333333 / 1e16), 0), coalesce((CAST(4803839602528529 AS REAL) / 18014398509481984), 0)),
(1, 4, -1, 0.0e0, 4, 4, 4, 0.0e0, 1.0e0, 0.0e0),
(1, 5, -1, 0.0e0, 5, 5, 5, 0.0e0, 0.0e0, 1.0e0),
(1, 6, 3, coalesce((CAST(7656119312842751 AS REAL) / 4503599627370496), 0), 7, 10, 10, 0.0e0, coalesce((CAST(3875190377039729 AS REAL) / 9007199254740992), 0), coalesce((5697674418604651 / 1e16), 0)),
(1, 7, 2, coalesce((5000000238418579 / 1e15), 0), 8, 9, 8, 0.0e0, coalesce((CAST(4157168886803535 AS REAL) / 4503599627370496), 0), coalesce((7692307692307693 / 1e17), 0)),
(1, 8, -1, 0.0e0, 8, 8, 8, 0.0e0, 1.0e0, 0.0e0),
(1, 9, -1, 0.0e0, 9, 9, 9, 0.0e0, 0.0e0, 1.0e0),
(1, 10, 2, coalesce((4850000143051147 / 1e15), 0), 11, 12, 12, 0.0e0, coalesce((2127659574468085 / 1e17), 0), coalesce((CAST(8815556717406077 AS REAL) / 9007199254740992), 0)),
(1, 11, -1, 0.0e0, 11, 11, 11, 0.0e0, coalesce((2 / 1e1), 0), coalesce((8 / 1e1), 0)),
(1, 12, -1, 0.0e0, 12, 12, 12, 0.0e0, 0.0e0, 1.0e0),
(2, 0, 3, coalesce((7500000298023224 / 1e16), 0), 1, 2, 2, coalesce((3333333333333333 / 1e16), 0), coalesce((38 / 1e2), 0), coalesce((2866666666666667 / 1e16), 0)),
(2, 1, -1, 0.0e0, 1, 1, 1, 1.0e0, 0.0e0, 0.0e0),
(2, 2, 3, coalesce((CAST(7430939546222591 AS REAL) / 4503599627370496), 0), 3, 6, 3, 0.0e0, coalesce((57 / 1e2), 0), coalesce((43 / 1e2), 0)),
(2, 3, 3, coalesce((1550000011920929 / 1e15), 0), 4, 5, 4, 0.0e0, coalesce((CAST(8685513567071671 AS REAL) / 9007199254740992), 0), coalesce((3571428571428571 / 1e17), 0)),
(2, 4, -1, 0.0e0, 4, 4, 4, 0.0e0, coalesce((CAST(8833983884457511 AS REAL) / 9007199254740992), 0), coalesce((CAST(1385722962267845 AS REAL) / 72057594037927936), 0)),
(2, 5, -1, 0.0e0, 5, 5, 5, 0.0e0, coalesce((75 / 1e2), 0), coalesce((25 / 1e2), 0)),
(2, 6, 2, coalesce((4850000143051147 / 1e15), 0), 7, 8, 8, 0.0e0, coalesce((6818181818181818 / 1e17), 0), coalesce((CAST(8393072032826833 AS REAL) / 9007199254740992), 0)),
(2, 7, -1, 0.0e0, 7, 7, 7, 0.0e0, coalesce((5 / 1e1), 0), coalesce((5 / 1e1), 0)),
(2, 8, -1, 0.0e0, 8, 8, 8, 0.0e0, coalesce((25 / 1e3), 0), coalesce((975 / 1e3), 0));

ANALYZE "__t2s_model_33dc85aced683fe4";

-- tree2sql 0.1.0: scikit-learn RandomForestClassifier (3 trees)
-- model fingerprint sha256:33dc85aced683fe47dfbfed29c8abc7e1037fbb1e15363e2c71b6d56eb7d3ebb
-- dialect sqlite, strategy model_table, combine average
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
"__t2s_scores" AS MATERIALIZED (
SELECT "row id",
  CASE WHEN "__t2s_ok" = 1 THEN ("__t2s_v0_0"
    + "__t2s_v1_0"
    + "__t2s_v2_0") / 3.0e0 END AS "__t2s_p0",
  CASE WHEN "__t2s_ok" = 1 THEN ("__t2s_v0_1"
    + "__t2s_v1_1"
    + "__t2s_v2_1") / 3.0e0 END AS "__t2s_p1",
  CASE WHEN "__t2s_ok" = 1 THEN ("__t2s_v0_2"
    + "__t2s_v1_2"
    + "__t2s_v2_2") / 3.0e0 END AS "__t2s_p2"
FROM "__t2s_pivot"
)
SELECT "row id",
  "__t2s_p0" AS "score_prob_0",
  "__t2s_p1" AS "score_prob_1",
  "__t2s_p2" AS "score_prob_2",
  CASE WHEN "__t2s_p0" IS NULL THEN NULL WHEN "__t2s_p0" >= "__t2s_p1" AND "__t2s_p0" >= "__t2s_p2" THEN 0 WHEN "__t2s_p1" >= "__t2s_p2" THEN 1 ELSE 2 END AS "score_class"
FROM "__t2s_scores"
