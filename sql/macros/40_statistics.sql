-- Statistics for the audit tables: confidence intervals for proportions, control-chart and
-- funnel-plot limits, and the small-cell disclosure rule. Conventions as stated at the top of
-- 10_units.sql: DOUBLE arithmetic, NULL in -> NULL out, NULL (never an error) where a formula is
-- undefined. Proportions are fractions (0..1), counts are non-negative integers.
--
-- Two-sided standard normal quantiles used as defaults below (scipy.stats.norm.ppf):
--   95 %   -> z = 1.959963984540054  (0.975 quantile)
--   99.8 % -> z = 3.090232306167813  (0.999 quantile)

-- wilson_lower(x, n, z := 1.959963984540054)
--   Formula: p = x / n; centre = (p + z^2 / 2n) / (1 + z^2 / n);
--            half = z * sqrt(p (1 - p) / n + z^2 / 4n^2) / (1 + z^2 / n);
--            lower limit = centre - half, at least 0, and exactly 0 when x = 0
--   Units:   x events out of n trials -> proportion (fraction)
--   Valid:   n > 0 and 0 <= x <= n (NULL otherwise)
--   Source:  Wilson EB 1927, J Am Stat Assoc 22:209; recommended over the Wald interval by Brown LD,
--            Cai TT, DasGupta A 2001, Stat Sci 16:101
--   Status:  verified (reproduced with statsmodels proportion_confint(method='wilson'));
--            citations from memory
CREATE OR REPLACE TEMP MACRO wilson_lower(x, n, z := 1.959963984540054) AS
    CASE
        WHEN CAST(n AS DOUBLE) > 0.0 AND CAST(x AS DOUBLE) BETWEEN 0.0 AND CAST(n AS DOUBLE) THEN
            CASE WHEN CAST(x AS DOUBLE) = 0.0 THEN 0.0 ELSE greatest(0.0,
                ((CAST(x AS DOUBLE) / CAST(n AS DOUBLE)) + CAST(z AS DOUBLE) ^ 2 / (2.0 * CAST(n AS DOUBLE))
                 - CAST(z AS DOUBLE) * sqrt(
                     (CAST(x AS DOUBLE) / CAST(n AS DOUBLE)) * (1.0 - CAST(x AS DOUBLE) / CAST(n AS DOUBLE))
                         / CAST(n AS DOUBLE)
                     + CAST(z AS DOUBLE) ^ 2 / (4.0 * CAST(n AS DOUBLE) ^ 2)))
                / (1.0 + CAST(z AS DOUBLE) ^ 2 / CAST(n AS DOUBLE)))
            END
    END;

-- wilson_upper(x, n, z := 1.959963984540054)
--   Formula: centre + half of the Wilson score interval (see wilson_lower), at most 1, and exactly 1
--            when x = n
--   Units:   x events out of n trials -> proportion (fraction)
--   Valid:   n > 0 and 0 <= x <= n (NULL otherwise)
--   Source:  Wilson EB 1927, J Am Stat Assoc 22:209; Brown LD, Cai TT, DasGupta A 2001, Stat Sci 16:101
--   Status:  verified (reproduced with statsmodels proportion_confint(method='wilson'));
--            citations from memory
CREATE OR REPLACE TEMP MACRO wilson_upper(x, n, z := 1.959963984540054) AS
    CASE
        WHEN CAST(n AS DOUBLE) > 0.0 AND CAST(x AS DOUBLE) BETWEEN 0.0 AND CAST(n AS DOUBLE) THEN
            CASE WHEN CAST(x AS DOUBLE) = CAST(n AS DOUBLE) THEN 1.0 ELSE least(1.0,
                ((CAST(x AS DOUBLE) / CAST(n AS DOUBLE)) + CAST(z AS DOUBLE) ^ 2 / (2.0 * CAST(n AS DOUBLE))
                 + CAST(z AS DOUBLE) * sqrt(
                     (CAST(x AS DOUBLE) / CAST(n AS DOUBLE)) * (1.0 - CAST(x AS DOUBLE) / CAST(n AS DOUBLE))
                         / CAST(n AS DOUBLE)
                     + CAST(z AS DOUBLE) ^ 2 / (4.0 * CAST(n AS DOUBLE) ^ 2)))
                / (1.0 + CAST(z AS DOUBLE) ^ 2 / CAST(n AS DOUBLE)))
            END
    END;

-- binomial_sigma(p_bar, n)
--   Formula: sigma = sqrt(p_bar (1 - p_bar) / n)   (standard error of a proportion around p_bar)
--   Units:   proportion, count -> proportion
--   Valid:   0 <= p_bar <= 1 and n > 0 (NULL otherwise)
--   Source:  binomial distribution; p-chart (Shewhart WA 1931, Economic Control of Quality of
--            Manufactured Product; Montgomery DC, Introduction to Statistical Quality Control)
--   Status:  verified (textbook formula); citations from memory
CREATE OR REPLACE TEMP MACRO binomial_sigma(p_bar, n) AS
    CASE WHEN CAST(n AS DOUBLE) > 0.0 AND CAST(p_bar AS DOUBLE) BETWEEN 0.0 AND 1.0 THEN
        sqrt(CAST(p_bar AS DOUBLE) * (1.0 - CAST(p_bar AS DOUBLE)) / CAST(n AS DOUBLE))
    END;

-- proportion_lower_limit(p_bar, n, z := 3.0, sigma_scale := 1.0)
--   Formula: p_bar - z * sigma_scale * binomial_sigma(p_bar, n), at least 0.
--            p-chart with varying subgroup size: z = 3, sigma_scale = 1, p_bar = sum(x) / sum(n);
--            Laney p'-chart: sigma_scale = laney_sigma_z(...), the between-subgroup spread;
--            funnel plot: z = 1.959963984540054 (95 %) or 3.090232306167813 (99.8 %), p_bar = the
--            overall proportion, n = the unit's volume (normal approximation to the binomial)
--   Units:   proportion, count -> proportion
--   Valid:   as binomial_sigma, z and sigma_scale not NULL (NULL otherwise)
--   Source:  p-chart: Shewhart 1931, Montgomery; Laney DB 2002, Quality Engineering 14:531;
--            funnel plots: Spiegelhalter DJ 2005, Stat Med 24:1185 (citations from memory)
--   Status:  verified against the check values p_bar 0.10, n 50 -> 0 (-0.0273 clipped); n 200 -> 0.0364
CREATE OR REPLACE TEMP MACRO proportion_lower_limit(p_bar, n, z := 3.0, sigma_scale := 1.0) AS
    CASE WHEN binomial_sigma(p_bar, n) IS NOT NULL AND z IS NOT NULL AND sigma_scale IS NOT NULL THEN
        greatest(0.0, CAST(p_bar AS DOUBLE)
                      - CAST(z AS DOUBLE) * CAST(sigma_scale AS DOUBLE) * binomial_sigma(p_bar, n))
    END;

-- proportion_upper_limit(p_bar, n, z := 3.0, sigma_scale := 1.0)
--   Formula: p_bar + z * sigma_scale * binomial_sigma(p_bar, n), at most 1 (uses as in
--            proportion_lower_limit: p-chart, Laney p'-chart, funnel plot)
--   Units:   proportion, count -> proportion
--   Valid:   as binomial_sigma, z and sigma_scale not NULL (NULL otherwise)
--   Source:  p-chart: Shewhart 1931, Montgomery; Laney DB 2002, Quality Engineering 14:531;
--            funnel plots: Spiegelhalter DJ 2005, Stat Med 24:1185 (citations from memory)
--   Status:  verified against the check values p_bar 0.10, n 50 -> 0.2273; n 200 -> 0.1636
CREATE OR REPLACE TEMP MACRO proportion_upper_limit(p_bar, n, z := 3.0, sigma_scale := 1.0) AS
    CASE WHEN binomial_sigma(p_bar, n) IS NOT NULL AND z IS NOT NULL AND sigma_scale IS NOT NULL THEN
        least(1.0, CAST(p_bar AS DOUBLE)
                   + CAST(z AS DOUBLE) * CAST(sigma_scale AS DOUBLE) * binomial_sigma(p_bar, n))
    END;

-- standardised_proportion(p, p_bar, n)
--   Formula: z_i = (p_i - p_bar) / binomial_sigma(p_bar, n_i)
--   Units:   proportions, count -> standard deviations (dimensionless)
--   Valid:   binomial_sigma > 0 (NULL otherwise, e.g. p_bar 0 or 1)
--   Source:  Laney DB 2002, Quality Engineering 14:531 (citation from memory)
--   Status:  verified (method; reproduces the Laney check values of the domain notes)
CREATE OR REPLACE TEMP MACRO standardised_proportion(p, p_bar, n) AS
    CASE WHEN binomial_sigma(p_bar, n) > 0.0 THEN
        (CAST(p AS DOUBLE) - CAST(p_bar AS DOUBLE)) / binomial_sigma(p_bar, n)
    END;

-- laney_sigma_z(mean_moving_range)
--   Formula: sigma_z = mean |z_i - z_(i-1)| / 1.128   (1.128 = d2 for moving ranges of two points)
--   Units:   standard deviations -> standard deviations; about 1 when the binomial model fits, above 1
--            with over-dispersion (usual with large monthly denominators)
--   Valid:   mean_moving_range >= 0 (NULL otherwise)
--   Source:  Laney DB 2002, Quality Engineering 14:531; d2 = 1.128 for n = 2 from the control-chart
--            constant tables (e.g. Montgomery); citations from memory
--   Status:  verified against the check value x = [30,45,28,50,33,41], n = [300,320,310,305,295,315]
--            -> mean moving range 2.5079, sigma_z 2.2233, UCL(n 300) 0.2495
CREATE OR REPLACE TEMP MACRO laney_sigma_z(mean_moving_range) AS
    CASE WHEN CAST(mean_moving_range AS DOUBLE) >= 0.0 THEN CAST(mean_moving_range AS DOUBLE) / 1.128 END;

-- is_small_cell(value, threshold)
--   Formula: 1 <= value < threshold  (0 is allowed; with threshold 11 the cells 1-10 are small)
--   Units:   count, count -> boolean
--   Valid:   value >= 0, threshold >= 1; NULL in -> NULL
--   Source:  US Centers for Medicare & Medicaid Services, cell size suppression policy (no cell
--            1-10 may be shown or derivable); threshold configurable per site
--   Status:  verified (policy text); the default threshold 11 follows it
CREATE OR REPLACE TEMP MACRO is_small_cell(value, threshold) AS
    CAST(value AS DOUBLE) >= 1.0 AND CAST(value AS DOUBLE) < CAST(threshold AS DOUBLE);
