-- The published rates: each is a numerator family over a denominator family of
-- audit_sample (the families are its boolean columns; 'samples' is every row).
-- Grain: one row per measure.
-- $hypoxaemia_pao2_mmhg, $hypoxaemia_sat_pct, $hyperoxaemia_pao2_mmhg: the derive stage's
-- definitions (pipeline/catalogue.toml [derive]), quoted in the definitions.
create or replace temp table audit_measure as
select *
from (
    values
        (1, 'fio2_device_documented', 'FiO2 and oxygen device documented', 'documentation',
         'fio2_device_documented', 'arterial',
         'FiO2 typed (or room air documented as the device) and an oxygen device other than unknown, '
         || 'among samples labelled arterial or of unknown type'),
        (2, 'fio2_device_mismatch', 'FiO2 the documented device cannot deliver', 'documentation',
         'fio2_device_mismatch', 'fio2_device_documented',
         'flagged by rule fio2_outside_device_range, among samples with FiO2 and device documented'),
        (3, 'hypoxaemia', 'Hypoxaemia', 'oxygenation',
         'hypoxaemic', 'oxygen_assessed',
         'PaO2 < ' || cast(cast($hypoxaemia_pao2_mmhg as decimal(6, 1)) as varchar)
         || ' mmHg or arterial saturation < ' || cast(cast($hypoxaemia_sat_pct as decimal(6, 1)) as varchar)
         || ' %, among included samples with an oxygen status'),
        (4, 'above_target_on_oxygen', 'Saturation above target on supplemental oxygen', 'oxygenation',
         'above_target_on_oxygen', 'on_oxygen',
         'arterial saturation above the upper end of the target range that applies, among included '
         || 'samples on supplemental oxygen'),
        (5, 'hyperoxaemia_on_oxygen', 'Hyperoxaemia on supplemental oxygen', 'oxygenation',
         'hyperoxaemic_on_oxygen', 'on_oxygen',
         'PaO2 > ' || cast(cast($hyperoxaemia_pao2_mmhg as decimal(6, 1)) as varchar)
         || ' mmHg, among included samples on supplemental oxygen'),
        (6, 'aa_above_age_limit', 'A-a gradient above the age-expected limit', 'oxygenation',
         'aa_above_limit', 'aa_assessed',
         'A-a gradient above the age-expected upper limit, among included room-air samples with age, PaO2 '
         || 'and PaCO2 recorded')
) as m(sort_order, measure, title, basis, numerator_family, denominator_family, definition);
