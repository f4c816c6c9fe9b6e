-- Golden snapshot of indb.plan.irls_scan.gram_query rendered for DuckDB (first scan, beta=None, ybar 0.125).
-- Spec: poisson, log link, response claims, offset ln(exposure); numeric age (centre 40,
-- scale 10) and power (centre 6, scale 2); categorical region with levels East, North, West
-- and reference North. Stored pretty-printed by sqlglot; the test checks that this text
-- parses back to exactly the SQL indb sends. Regenerate with INDB_UPDATE_GOLDEN=1 and
-- review the diff.
SELECT
  "f0",
  SUM("fww") AS "s_0_0",
  SUM("fww" * "v1") AS "s_0_1",
  SUM("fww" * "v2") AS "s_0_2",
  SUM((
    "fww" * "v1"
  ) * "v1") AS "s_1_1",
  SUM((
    "fww" * "v1"
  ) * "v2") AS "s_1_2",
  SUM((
    "fww" * "v2"
  ) * "v2") AS "s_2_2",
  SUM("fwwz") AS "t_0",
  SUM("fwwz" * "v1") AS "t_1",
  SUM("fwwz" * "v2") AS "t_2",
  SUM("fdev") AS "dev",
  SUM("fpear") AS "pear",
  SUM("bad") AS "bad",
  COUNT(*) AS "n",
  SUM("fw") AS "nw"
FROM (
  SELECT
    "f0",
    "v1",
    "v2",
    "fw" * (
      (
        (
          "pw" * "dmu"
        ) * "dmu"
      ) / "var"
    ) AS "fww",
    (
      "fw" * (
        (
          (
            "pw" * "dmu"
          ) * "dmu"
        ) / "var"
      )
    ) * (
      (
        "eta" - "off"
      ) + CASE WHEN "dmu" <> 0.0e0 THEN (
        "y" - "mu"
      ) / "dmu" ELSE 0.0e0 END
    ) AS "fwwz",
    (
      "fw" * "pw"
    ) * (
      2.0e0 * (
        CASE WHEN "y" > 0.0e0 THEN "y" * LN("y" / "mu") ELSE 0.0e0 END - (
          "y" - "mu"
        )
      )
    ) AS "fdev",
    (
      (
        (
          "fw" * "pw"
        ) * (
          "y" - "mu"
        )
      ) * (
        "y" - "mu"
      )
    ) / "var" AS "fpear",
    "bad",
    "fw"
  FROM (
    SELECT
      "f0",
      "v1",
      "v2",
      "y",
      "pw",
      "fw",
      "off",
      "eta",
      "bad",
      "mu",
      "mu" AS "dmu",
      "mu" AS "var"
    FROM (
      SELECT
        "f0",
        "v1",
        "v2",
        "y",
        "pw",
        "fw",
        "off",
        "eta",
        "seta",
        CASE WHEN (
          "eta_bad" > 0
        ) OR (
          NOT ISFINITE("mu_raw")
        ) THEN 1 ELSE 0 END AS "bad",
        GREATEST(CASE WHEN ISFINITE("mu_raw") THEN "mu_raw" ELSE 1.0e0 END, 1e-100) AS "mu"
      FROM (
        SELECT
          "f0",
          "v1",
          "v2",
          "y",
          "pw",
          "fw",
          "off",
          "eta",
          "seta",
          "eta_bad",
          EXP(LEAST(GREATEST("seta", -700.0e0), 700.0e0)) AS "mu_raw"
        FROM (
          SELECT
            "f0",
            "v1",
            "v2",
            "y",
            "pw",
            "fw",
            "off",
            "eta",
            CASE WHEN "eta" <= 700.0e0 THEN "eta" ELSE 1.0e0 END AS "seta",
            CASE WHEN NOT (
              "eta" <= 700.0e0
            ) THEN 1 ELSE 0 END AS "eta_bad"
          FROM (
            SELECT
              "f0",
              "v1",
              "v2",
              "y",
              "pw",
              "fw",
              "off",
              LN(
                CASE
                  WHEN (
                    (
                      "y" + 0.125e0
                    ) / 2.0e0
                  ) > 0.0e0
                  THEN (
                    "y" + 0.125e0
                  ) / 2.0e0
                  ELSE 0.125e0
                END
              ) AS "eta"
            FROM (
              SELECT
                CAST("region" AS TEXT) AS "f0",
                (
                  CAST("age" AS DOUBLE) - 40.0e0
                ) / 10.0e0 AS "v1",
                (
                  CAST("power" AS DOUBLE) - 6.0e0
                ) / 2.0e0 AS "v2",
                CAST("claims" AS DOUBLE) AS "y",
                1.0e0 AS "pw",
                1.0e0 AS "fw",
                CAST(LN(exposure) AS DOUBLE) AS "off"
              FROM "claims_table" AS "indb_src"
              WHERE
                (
                  (
                    (
                      (
                        (
                          NOT (
                            "claims" IS NULL
                          )
                        ) AND (
                          NOT (
                            "age" IS NULL
                          )
                        )
                      )
                      AND (
                        NOT (
                          "power" IS NULL
                        )
                      )
                    )
                    AND (
                      NOT (
                        "region" IS NULL
                      )
                    )
                  )
                  AND (
                    NOT (
                      "exposure" IS NULL
                    )
                  )
                )
                AND (
                  NOT (
                    LN(exposure) IS NULL
                  )
                )
            ) AS "r"
          ) AS "e"
        ) AS "e1"
      ) AS "m0"
    ) AS "m"
  ) AS "w0"
) AS "w"
GROUP BY
  "f0"
