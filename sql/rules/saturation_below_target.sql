-- Clinical: saturation below the target range that applies, not hypoxaemic.
select
    sample_id,
    null as severity,
    printf('saturation %.0f %% below the %.0f-%.0f %% target', arterial_saturation_pct, target_low_pct,
           target_high_pct) as message,
    json_object('arterial_saturation_pct', round(arterial_saturation_pct, 1), 'target_low_pct', target_low_pct,
                'target_high_pct', target_high_pct) as evidence
from rule_input
where oxygen_status = 'below_target';
