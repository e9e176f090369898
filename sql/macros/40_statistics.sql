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

-- Funnel plots with over-dispersion (Spiegelhalter DJ 2005, "Handling over-dispersion of
-- performance indicators", Qual Saf Health Care 14:347-351; details below from memory). Each
-- unit i of a group of I comparable units has a proportion y_i = x_i / n_i; the group's centre
-- is p0 and, under the binomial model alone, s_i^2 = p0 (1 - p0) / n_i. The z-scores
-- z_i = (y_i - p0) / s_i are standardised_proportion(y_i, p0, n_i). When the units vary more
-- than chance allows, the limits are widened, either by a factor (multiplicative) or by a
-- between-unit variance (additive, random effects); the macros below hold those formulas.

-- winsorised_count(units, pct)
--   Formula: floor(pct / 100 * units): how many of `units` z-scores are pulled in at EACH end when
--            winsorising at pct percent each side (the lowest ones set to the lowest value kept, the
--            highest to the highest kept), so that a few extreme units cannot by themselves inflate
--            the estimate of over-dispersion that then widens their own limits
--   Units:   count, percent -> count
--   Valid:   units >= 0 and 0 <= pct < 50 (NULL otherwise)
--   Source:  Spiegelhalter 2005 (winsorising the z-scores, 10 % each side as his example; from
--            memory); rounding down as scipy.stats.mstats.winsorize with inclusive limits
--   Status:  verified against scipy.stats.mstats.winsorize (tests/test_funnel.py)
CREATE OR REPLACE TEMP MACRO winsorised_count(units, pct) AS
    CASE WHEN CAST(units AS DOUBLE) >= 0.0 AND CAST(pct AS DOUBLE) >= 0.0 AND CAST(pct AS DOUBLE) < 50.0 THEN
        CAST(floor(CAST(pct AS DOUBLE) / 100.0 * CAST(units AS DOUBLE)) AS BIGINT)
    END;

-- funnel_weight(p0, n)
--   Formula: w_i = 1 / s_i^2 = n_i / (p0 (1 - p0))   (inverse binomial variance around the centre)
--   Units:   proportion, count -> 1 / proportion^2
--   Valid:   0 < p0 < 1 and n > 0 (NULL otherwise)
--   Source:  Spiegelhalter 2005 (from memory)
--   Status:  verified (tests/test_funnel.py, with the DerSimonian-Laird oracle)
CREATE OR REPLACE TEMP MACRO funnel_weight(p0, n) AS
    CASE WHEN binomial_sigma(p0, n) > 0.0 THEN 1.0 / binomial_sigma(p0, n) ^ 2 END;

-- overdispersion_phi(sum_z2, units)
--   Formula: phi = sum z_i^2 / I   (z_i winsorised; about 1 when the binomial model fits)
--   Units:   standard deviations^2, count -> dimensionless
--   Valid:   units > 0 (NULL otherwise)
--   Source:  Spiegelhalter 2005 (multiplicative over-dispersion factor; from memory)
--   Status:  verified against scipy.stats.mstats.winsorize and statsmodels combine_effects
--            (Q / I; tests/test_funnel.py)
CREATE OR REPLACE TEMP MACRO overdispersion_phi(sum_z2, units) AS
    CASE WHEN CAST(units AS DOUBLE) > 0.0 THEN CAST(sum_z2 AS DOUBLE) / CAST(units AS DOUBLE) END;

-- overdispersion_tau2(sum_z2, units, sum_w, sum_w2)
--   Formula: tau^2 = max(0, (I phi - (I - 1)) / (sum w_i - sum w_i^2 / sum w_i)), with I phi = sum z_i^2
--            (z_i winsorised) and w_i = funnel_weight(p0, n_i): the between-unit variance, on the
--            proportion scale, of an additive random-effects model
--   Units:   standard deviations^2, count, weights -> proportion^2
--   Valid:   units >= 2, sum_w > 0 and sum_w - sum_w2 / sum_w > 0 (NULL otherwise)
--   Source:  Spiegelhalter 2005 (from memory); the DerSimonian R, Laird N 1986 (Control Clin Trials
--            7:177) moment estimator with Q = sum z_i^2, its fixed-effect mean being p0 (citation
--            from memory)
--   Status:  verified against statsmodels combine_effects(method_re='dl') (tests/test_funnel.py)
CREATE OR REPLACE TEMP MACRO overdispersion_tau2(sum_z2, units, sum_w, sum_w2) AS
    CASE WHEN CAST(units AS DOUBLE) >= 2.0 AND CAST(sum_w AS DOUBLE) > 0.0
              AND CAST(sum_w AS DOUBLE) - CAST(sum_w2 AS DOUBLE) / CAST(sum_w AS DOUBLE) > 0.0 THEN
        greatest(0.0, (CAST(sum_z2 AS DOUBLE) - (CAST(units AS DOUBLE) - 1.0))
                      / (CAST(sum_w AS DOUBLE) - CAST(sum_w2 AS DOUBLE) / CAST(sum_w AS DOUBLE)))
    END;

-- funnel_sigma(p0, n, overdispersion := 'none', phi := 1.0, tau2 := 0.0)
--   Formula: 'none'           s_i = sqrt(p0 (1 - p0) / n_i)           (binomial_sigma)
--            'multiplicative' s_i * sqrt(max(phi, 1))                  (only ever widened)
--            'additive'       sqrt(s_i^2 + tau^2)
--   Units:   proportion, count, method, dimensionless, proportion^2 -> proportion
--   Valid:   as binomial_sigma; phi (multiplicative) or tau2 >= 0 (additive) not NULL; another
--            method -> NULL
--   Source:  Spiegelhalter 2005 (from memory)
--   Status:  verified against a hand-computed example (tests/test_funnel.py)
CREATE OR REPLACE TEMP MACRO funnel_sigma(p0, n, overdispersion := 'none', phi := 1.0, tau2 := 0.0) AS
    CASE overdispersion
        WHEN 'none' THEN binomial_sigma(p0, n)
        WHEN 'multiplicative' THEN
            CASE WHEN phi IS NOT NULL THEN binomial_sigma(p0, n) * sqrt(greatest(CAST(phi AS DOUBLE), 1.0)) END
        WHEN 'additive' THEN
            CASE WHEN CAST(tau2 AS DOUBLE) >= 0.0 THEN sqrt(binomial_sigma(p0, n) ^ 2 + CAST(tau2 AS DOUBLE)) END
    END;

-- funnel_lower_limit(p0, n, z, overdispersion := 'none', phi := 1.0, tau2 := 0.0)
--   Formula: p0 - z * funnel_sigma(p0, n, overdispersion, phi, tau2), at least 0. With 'none' the
--            same as proportion_lower_limit(p0, n, z) (normal approximation to the binomial);
--            z = 1.959963984540054 (95 %) or 3.090232306167813 (99.8 %)
--   Units:   proportion, count, standard deviations, ... -> proportion
--   Valid:   as funnel_sigma, z not NULL (NULL otherwise)
--   Source:  Spiegelhalter 2005 (from memory); Spiegelhalter DJ 2005, Stat Med 24:1185 (funnel plots;
--            citation from memory)
--   Status:  verified against a hand-computed example and scipy.stats.norm (tests/test_funnel.py)
CREATE OR REPLACE TEMP MACRO funnel_lower_limit(p0, n, z, overdispersion := 'none', phi := 1.0, tau2 := 0.0) AS
    -- greatest() and least() skip NULLs in DuckDB, so an undefined sigma must give NULL, not the bound
    CASE WHEN funnel_sigma(p0, n, overdispersion, phi, tau2) IS NOT NULL AND z IS NOT NULL THEN
        greatest(0.0, CAST(p0 AS DOUBLE) - CAST(z AS DOUBLE) * funnel_sigma(p0, n, overdispersion, phi, tau2))
    END;

-- funnel_upper_limit(p0, n, z, overdispersion := 'none', phi := 1.0, tau2 := 0.0)
--   Formula: p0 + z * funnel_sigma(p0, n, overdispersion, phi, tau2), at most 1 (see funnel_lower_limit)
--   Units:   proportion, count, standard deviations, ... -> proportion
--   Valid:   as funnel_sigma, z not NULL (NULL otherwise)
--   Source:  Spiegelhalter 2005 (from memory)
--   Status:  verified against a hand-computed example and scipy.stats.norm (tests/test_funnel.py)
CREATE OR REPLACE TEMP MACRO funnel_upper_limit(p0, n, z, overdispersion := 'none', phi := 1.0, tau2 := 0.0) AS
    CASE WHEN funnel_sigma(p0, n, overdispersion, phi, tau2) IS NOT NULL AND z IS NOT NULL THEN
        least(1.0, CAST(p0 AS DOUBLE) + CAST(z AS DOUBLE) * funnel_sigma(p0, n, overdispersion, phi, tau2))
    END;
