-- The published rates: each is a numerator family over a denominator family of
-- audit_sample_fact (the families are its boolean columns; 'samples' is every row).
-- Oxygenation measures, and the two oxygen-documentation measures computed from the oxygen
-- status, count adults only: age group 'adult', or 'unknown' (no age and no birth date; the
-- derive stage applies adult targets to them). Neonates and children are counted apart
-- (audit_age_groups): the adult targets, the adult A-a formula and the saturation curve check
-- do not apply to them. An oxygen status of 'oxygen_unknown' or 'not_assessed' is never in an
-- in-target or above-target numerator or denominator.
-- question: the report section that answers it; level: what one count is (a sample, or an
-- episode: an encounter, or a patient-day where no encounter is exported, counted in the unit
-- and period of its first sample so that repeat sampling of one patient does not dominate).
-- Prescribing measures link each sample to the prescription active at its collection time
-- (sql/derive/05_prescription_link.sql); sites without prescription data have no denominator.
-- Grain: one row per measure.
-- $hypoxaemia_pao2_mmhg, $hypoxaemia_sat_pct, $hyperoxaemia_pao2_mmhg: the derive stage's
-- definitions (pipeline/catalogue.toml [derive]), quoted in the definitions.
create or replace temp table audit_measure as
select
    sort_order, measure, title, basis, numerator_family, denominator_family, definition,
    case
        when basis = 'episode' then 'episodes'
        else basis
    end as question,
    case when basis = 'episode' then 'episode' else 'sample' end as level
from (
    values
        (1, 'fio2_device_documented', 'FiO2 and oxygen device documented', 'documentation',
         'fio2_device_documented', 'arterial',
         'FiO2 typed (or room air documented as the device) and an oxygen device other than unknown, '
         || 'among samples labelled arterial or of unknown type'),
        (2, 'fio2_device_mismatch', 'FiO2 the documented device cannot deliver', 'documentation',
         'fio2_device_mismatch', 'fio2_device_documented',
         'flagged by rule fio2_outside_device_range, among samples with FiO2 and device documented'),
        (3, 'oxygen_status_unknown', 'Oxygen status unknown', 'documentation',
         'oxygen_unknown', 'oxygen_assessed',
         'neither FiO2 nor an oxygen device documented and PaO2 within what room air allows, so whether the '
         || 'patient was on oxygen cannot be told (never counted as in or above target), among included adult '
         || 'arterial samples with a PaO2 and a target range that applies'),
        (4, 'undocumented_oxygen', 'Oxygen given but not documented', 'documentation',
         'undocumented_oxygen', 'no_oxygen_documented',
         'PaO2 above what the alveolar PO2 of room air allows, so the patient was breathing supplemental oxygen '
         || 'that nobody charted, among included adult arterial samples with a PaO2 and a target range that '
         || 'applies and no supplemental oxygen documented (neither FiO2 nor device, or room air)'),
        (5, 'hypoxaemia', 'Hypoxaemia', 'oxygenation',
         'hypoxaemic', 'oxygen_assessed',
         'arterial saturation below the lower end of the target range that applies and PaO2 < '
         || cast(cast($hypoxaemia_pao2_mmhg as decimal(6, 1)) as varchar)
         || ' mmHg or arterial saturation < ' || cast(cast($hypoxaemia_sat_pct as decimal(6, 1)) as varchar)
         || ' % (so a patient at risk of hypercapnic failure inside 88-92 % is in target), among included adult '
         || 'arterial samples with a PaO2 and a target range that applies'),
        (6, 'above_target_on_oxygen', 'Saturation above target on supplemental oxygen', 'oxygenation',
         'above_target_on_oxygen', 'on_oxygen',
         'arterial saturation above the upper end of the target range that applies, among included adult '
         || 'arterial samples with a PaO2, a target range that applies and supplemental oxygen documented'),
        (7, 'hyperoxaemia_on_oxygen', 'Hyperoxaemia on supplemental oxygen', 'oxygenation',
         'hyperoxaemic_on_oxygen', 'on_oxygen',
         'PaO2 > ' || cast(cast($hyperoxaemia_pao2_mmhg as decimal(6, 1)) as varchar)
         || ' mmHg, among included adult arterial samples with a PaO2, a target range that applies and '
         || 'supplemental oxygen documented'),
        (8, 'aa_above_age_limit', 'A-a gradient above the age-expected limit', 'oxygenation',
         'aa_above_limit', 'aa_assessed',
         'A-a gradient above the age-expected upper limit, among included adult room-air samples with age, PaO2 '
         || 'and PaCO2 recorded and a PaO2 that room air allows'),
        (9, 'on_oxygen_prescribed', 'On oxygen with an active prescription', 'prescribing',
         'rx_active', 'rx_known',
         'a prescription active at the collection time (with or without a target range), among included adult '
         || 'arterial samples on supplemental oxygen for which prescribing is known'),
        (10, 'prescribed_target_documented', 'On oxygen with a prescribed target range', 'prescribing',
         'rx_with_target', 'rx_known',
         'an active prescription that states a saturation target range, among included adult arterial samples '
         || 'on supplemental oxygen for which prescribing is known'),
        (11, 'within_prescribed_target', 'Within the prescribed target range', 'prescribing',
         'rx_within_target', 'rx_target_assessed',
         'arterial saturation inside the prescribed target range (ends included), among included adult arterial '
         || 'samples on supplemental oxygen with a prescribed target range and a saturation'),
        (12, 'above_prescribed_target', 'Above the prescribed target range on oxygen (over-oxygenation)',
         'prescribing', 'rx_above_target', 'rx_target_assessed',
         'arterial saturation above the prescribed target range, among included adult arterial samples on '
         || 'supplemental oxygen with a prescribed target range and a saturation'),
        (13, 'below_prescribed_target', 'Below the prescribed target range on oxygen', 'prescribing',
         'rx_below_target', 'rx_target_assessed',
         'arterial saturation below the prescribed target range, among included adult arterial samples on '
         || 'supplemental oxygen with a prescribed target range and a saturation'),
        (14, 'oxygen_not_prescribed', 'Oxygen documented on the sample but not prescribed', 'prescribing',
         'rx_not_prescribed', 'rx_known',
         'supplemental oxygen documented on the sample and no prescription active at the collection time, among '
         || 'included adult arterial samples on supplemental oxygen for which prescribing is known'),
        (15, 'prescribed_target_disagrees_with_risk', 'Prescribed target disagrees with the hypercapnic-risk status',
         'prescribing', 'rx_target_conflicts_risk', 'rx_risk_documented',
         'a prescribed target range that is not the 88-92 % range for a patient documented at risk of hypercapnic '
         || 'failure, or is the 88-92 % range for a patient documented not at risk, among included adult arterial '
         || 'samples with a prescribed target range and the hypercapnic risk documented'),
        (16, 'episode_first_sample_hypoxaemic', 'Hypoxaemia on the first sample of the episode', 'episode',
         'episodes_first_hypoxaemic', 'episodes',
         'episodes (an encounter, or a patient-day where no encounter is exported) whose first included adult '
         || 'arterial sample is hypoxaemic, among episodes with at least one such sample with a target range '
         || 'that applies; each episode counts once, in the unit and period of its first sample'),
        (17, 'episode_any_hypoxaemia', 'Any hypoxaemia in the episode', 'episode',
         'episodes_any_hypoxaemic', 'episodes',
         'episodes with at least one hypoxaemic sample, among episodes with at least one included adult arterial '
         || 'sample with a target range that applies; each episode counts once, in the unit and period of its '
         || 'first sample'),
        (18, 'episode_any_above_target_on_oxygen', 'Any saturation above target on oxygen in the episode',
         'episode', 'episodes_any_above_target', 'episodes_on_oxygen',
         'episodes with at least one sample above the target range that applies while on supplemental oxygen, '
         || 'among episodes with at least one included adult arterial sample on supplemental oxygen; each episode '
         || 'counts once, in the unit and period of its first sample'),
        (19, 'episode_any_out_of_target_on_oxygen', 'Any saturation outside target on oxygen in the episode',
         'episode', 'episodes_any_out_of_target', 'episodes_on_oxygen',
         'episodes with at least one sample above or below the target range that applies while on supplemental '
         || 'oxygen, among episodes with at least one included adult arterial sample on supplemental oxygen; each '
         || 'episode counts once, in the unit and period of its first sample')
) as m(sort_order, measure, title, basis, numerator_family, denominator_family, definition);
