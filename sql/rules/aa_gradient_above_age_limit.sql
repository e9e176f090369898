-- Clinical: A-a gradient above its age-expected limit (room air only; the limit is NULL otherwise).
select
    sample_id,
    null as severity,
    printf('A-a gradient %.0f mmHg above the age-expected limit of %.0f mmHg (age %.0f)', aa_gradient_mmhg,
           aa_gradient_expected_mmhg, age_years) as message,
    json_object('aa_gradient_mmhg', round(aa_gradient_mmhg, 1), 'aa_gradient_expected_mmhg',
                round(aa_gradient_expected_mmhg, 1), 'age_years', age_years) as evidence
from rule_input
where aa_gradient_mmhg > aa_gradient_expected_mmhg;
