-- Clinical: saturation above the target range that applies, on supplemental oxygen.
select
    sample_id,
    null as severity,
    printf('saturation %.0f %% above the %.0f-%.0f %% target on FiO2 %.2f', arterial_saturation_pct,
           target_low_pct, target_high_pct, fio2_used) as message,
    json_object('arterial_saturation_pct', round(arterial_saturation_pct, 1), 'target_low_pct', target_low_pct,
                'target_high_pct', target_high_pct, 'fio2', fio2_used) as evidence
from rule_input
where oxygen_status = 'above_target_on_oxygen';
