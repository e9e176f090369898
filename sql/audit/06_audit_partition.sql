-- Additive relations between published count families of audit_cell beyond the unit and
-- period margins: in every unit and period the 'total' family equals the sum of its 'part'
-- families, so one hidden part could be recovered from the total and the other parts.
-- (A rate's numerator and denominator are related through audit_pair instead.)
-- Grain: one row per (partition, family).
create or replace temp table audit_partition as
select partition_id, family, role
from (
    values
        ('audit_status', 'samples', 'total'),
        ('audit_status', 'samples_usable', 'part'),
        ('audit_status', 'samples_caution', 'part'),
        ('audit_status', 'samples_excluded', 'part'),
        ('exclusion_reason', 'samples_excluded', 'total'),
        ('exclusion_reason', 'excluded_sample_type', 'part'),
        ('exclusion_reason', 'excluded_data_quality', 'part'),
        ('sample_type', 'samples', 'total'),
        ('sample_type', 'arterial', 'part'),
        ('sample_type', 'excluded_sample_type', 'part'),
        ('pf_band', 'pf_assessed', 'total'),
        ('pf_band', 'pf_severe', 'part'),
        ('pf_band', 'pf_moderate', 'part'),
        ('pf_band', 'pf_mild', 'part'),
        ('pf_band', 'pf_above_300', 'part'),
        ('age_group', 'samples', 'total'),
        ('age_group', 'age_adult', 'part'),
        ('age_group', 'age_unknown', 'part'),
        ('age_group', 'age_child', 'part'),
        ('age_group', 'age_neonate', 'part'),
        -- included adult samples with a target: supplemental oxygen documented, or not
        ('oxygen_documentation', 'oxygen_assessed', 'total'),
        ('oxygen_documentation', 'on_oxygen', 'part'),
        ('oxygen_documentation', 'no_oxygen_documented', 'part'),
        -- on oxygen with the prescription known: an active prescription, or none
        ('prescription', 'rx_known', 'total'),
        ('prescription', 'rx_active', 'part'),
        ('prescription', 'rx_not_prescribed', 'part'),
        -- on oxygen with a prescribed target and a saturation: below, within or above it
        ('prescribed_target', 'rx_target_assessed', 'total'),
        ('prescribed_target', 'rx_below_target', 'part'),
        ('prescribed_target', 'rx_within_target', 'part'),
        ('prescribed_target', 'rx_above_target', 'part')
) as p(partition_id, family, role)
union all
-- each family published by adult age band is the sum of its bands (audit_age_band_family)
select 'age_band:' || base_family, base_family, 'total' from audit_age_band_family group by base_family
union all
select 'age_band:' || base_family, family, 'part' from audit_age_band_family;
