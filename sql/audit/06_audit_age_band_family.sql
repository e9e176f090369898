-- The count families published by adult age band ('<family>@<band>'): the oxygenation and
-- prescribing rates most affected by age (hypoxaemia, above target on oxygen, within the
-- prescribed target), each numerator and denominator in five bands. Age bands are common
-- practice in audit tables; 'age unknown' holds the adults without an age (adult targets apply).
-- Grain: one row per (family, band).
create or replace temp table audit_age_band_family as
select f.base_family || '@' || b.age_band as family, f.base_family, b.age_band, b.band_order
from (
    values ('oxygen_assessed'), ('hypoxaemic'), ('on_oxygen'), ('above_target_on_oxygen'),
           ('rx_target_assessed'), ('rx_within_target')
) as f(base_family)
cross join (
    values (1, 'under 45'), (2, '45-64'), (3, '65-79'), (4, '80 and over'), (5, 'age unknown')
) as b(band_order, age_band);

-- The rates published by age band: numerator family over denominator family (both in the list
-- above), named as the measure of audit_measure that they split.
create or replace temp table audit_age_band_rate as
select *
from (
    values
        ('hypoxaemia', 'hypoxaemic', 'oxygen_assessed'),
        ('above_target_on_oxygen', 'above_target_on_oxygen', 'on_oxygen'),
        ('within_prescribed_target', 'rx_within_target', 'rx_target_assessed')
) as r(measure, numerator_family, denominator_family);
