-- Numerator and denominator families of every published proportion (the rates of
-- audit_measure, the P/F band shares, the flag rate of each data-quality or documentation
-- rule). Publishing both lets a reader compute denominator - numerator, so a small
-- remainder hides the numerator (and with it the proportion) just as a small numerator does.
-- Grain: one row per (numerator family, denominator family).
create or replace temp table audit_pair as
select numerator_family, denominator_family from audit_measure
union all
select family, 'pf_assessed'
from (values ('pf_severe'), ('pf_moderate'), ('pf_mild'), ('pf_above_300')) as b(family)
union all
select 'flag:' || rule_id, 'samples' from rule_catalogue where kind in ('data_quality', 'documentation')
union all
-- the age-band rates: each band's numerator over the same band's denominator
select n.family, d.family
from audit_age_band_family as n
join audit_age_band_family as d on d.age_band = n.age_band
join audit_age_band_rate as r on r.numerator_family = n.base_family and r.denominator_family = d.base_family;
