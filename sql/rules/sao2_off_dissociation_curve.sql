-- Measured SaO2 against the PaO2 of the same sample on the oxygen dissociation curve, allowing
-- for the spread of real curves: the standard curve (standardised for pH and base excess) is
-- shifted by +/- $p50_shift_mmhg of P50 (2,3-DPG, disease, transfusion move a patient's P50 by a
-- few mmHg) and a tolerance for the equation and the co-oximeter is added. Adults (and records
-- of unknown age) only: fetal haemoglobin moves a newborn's curve; not applied when
-- carboxy- or methaemoglobin is raised (they shift the curve), nor on the flat part.
-- The saturation compared is the functional one (derived.sao2_curve_pct); when neither
-- COHb nor MetHb is reported, the band's lower end allows $unreported_dyshaemoglobin_pct of
-- unreported carboxyhaemoglobin (a smoker's oxyhaemoglobin fraction sits that far below).
with inputs as (
    select
        *,
        -- without COHb and MetHb the oxyhaemoglobin fraction of a smoker sits below the functional
        -- saturation by up to this many points
        case when cohb_pct is null and methb_pct is null
             then $unreported_dyshaemoglobin_pct * sao2_curve_pct / 100.0 else 0.0 end as unreported_allowance
    from rule_input
),
banded as (
    select
        *,
        saturation_with_p50_shift_pct(pao2_mmhg, $p50_shift_mmhg, ph := coalesce(ph, 7.40),
                                      base_excess := coalesce(base_excess_mmol_l, 0.0)) - $tolerance_pct
            - unreported_allowance as band_low,
        saturation_with_p50_shift_pct(pao2_mmhg, -$p50_shift_mmhg, ph := coalesce(ph, 7.40),
                                      base_excess := coalesce(base_excess_mmol_l, 0.0)) + $tolerance_pct as band_high,
        saturation_with_p50_shift_pct(pao2_mmhg, 2 * $p50_shift_mmhg, ph := coalesce(ph, 7.40),
                                      base_excess := coalesce(base_excess_mmol_l, 0.0)) - $tolerance_pct
            - unreported_allowance as wide_low,
        saturation_with_p50_shift_pct(pao2_mmhg, -2 * $p50_shift_mmhg, ph := coalesce(ph, 7.40),
                                      base_excess := coalesce(base_excess_mmol_l, 0.0)) + $tolerance_pct as wide_high
    from inputs
    where sao2_curve_pct is not null
      and age_group in ('adult', 'unknown')
      and pao2_mmhg <= $pao2_max_mmhg
      and predicted_sao2_pct between $predicted_min_pct and $predicted_max_pct
)
select
    sample_id,
    case when sao2_curve_pct not between wide_low and wide_high then 'high' end as severity,
    printf('possible SaO2 and PaO2 from different samples or a mistyped value: measured SaO2 %.1f %% is outside '
           || 'the %.0f-%.0f %% that PaO2 %.0f mmHg gives on any curve with P50 within %.0f mmHg of normal; check '
           || 'both values against the analyser printout; do not withdraw a result on this flag alone',
           sao2_curve_pct, band_low, band_high, pao2_mmhg, $p50_shift_mmhg) as message,
    json_object('sao2_functional_pct', round(sao2_curve_pct, 1), 'band_low_pct', round(band_low, 1),
                'band_high_pct', round(band_high, 1), 'predicted_sao2_pct', round(predicted_sao2_pct, 1),
                'pao2_mmhg', pao2_mmhg, 'ph', ph, 'cohb_pct', cohb_pct, 'methb_pct', methb_pct) as evidence
from banded
where sao2_curve_pct not between band_low and band_high;
