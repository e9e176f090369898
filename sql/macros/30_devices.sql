-- Oxygen delivery devices: which FiO2 a documented device and flow can plausibly deliver.
-- Conventions as stated at the top of 10_units.sql. Device codes are the canonical ones
-- (pipeline/schema.py, OXYGEN_DEVICES): room_air, nasal_cannula, simple_mask, venturi_mask,
-- reservoir_mask, high_flow_nasal, cpap, niv, invasive_ventilation, tracheostomy_mask, other, unknown.
-- 'other', 'unknown', NULL and any unrecognised code give NULL: nothing can be said about them.
-- The oxygen flow (L/min) is read only for nasal_cannula; a negative flow gives NULL for every device.
-- FiO2 values are fractions. Low-flow device FiO2 is inherently uncertain (measured SD up to 0.15), so
-- the plausible ranges are deliberately wide: they separate "cannot be" from "unusual".

-- device_fio2_min(device, flow_l_min)
--   Formula: room_air 0.20; nasal_cannula 0.22; simple_mask 0.30; venturi_mask 0.23 (lowest labelled
--            setting 0.24 - 0.01); reservoir_mask 0.50; high_flow_nasal, cpap, niv, invasive_ventilation,
--            tracheostomy_mask (set FiO2) 0.21
--   Units:   device code, flow in L/min -> FiO2 fraction
--   Valid:   canonical device codes; flow >= 0 or NULL
--   Source:  plausibility table built on BTS guideline for oxygen use in adults 2017 (O'Driscoll BR et al.,
--            Thorax 72 Suppl 1) and Wettstein RB, Shelledy DC, Peters JI 2005, Respir Care 50:604
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO device_fio2_min(device, flow_l_min) AS
    CAST(CASE
        WHEN CAST(flow_l_min AS DOUBLE) < 0.0 THEN NULL
        WHEN device = 'room_air' THEN 0.20
        WHEN device = 'nasal_cannula' THEN 0.22
        WHEN device = 'simple_mask' THEN 0.30
        WHEN device = 'venturi_mask' THEN 0.23
        WHEN device = 'reservoir_mask' THEN 0.50
        WHEN device IN ('high_flow_nasal', 'cpap', 'niv', 'invasive_ventilation', 'tracheostomy_mask') THEN 0.21
    END AS DOUBLE);

-- device_fio2_max(device, flow_l_min)
--   Formula: room_air 0.22; nasal_cannula min(0.25 + 0.05 Q, 0.55) (0.55 when Q is not recorded);
--            simple_mask 0.65; venturi_mask 0.61 (highest labelled setting 0.60 + 0.01); reservoir_mask and
--            the set-FiO2 devices 1.00
--   Units:   device code, flow Q in L/min -> FiO2 fraction
--   Valid:   canonical device codes; flow >= 0 or NULL
--   Source:  as device_fio2_min (nasal cannula: measured pharyngeal FiO2 0.26-0.54 at 1-6 L/min,
--            Wettstein RB, Shelledy DC, Peters JI 2005, Respir Care 50:604)
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO device_fio2_max(device, flow_l_min) AS
    CAST(CASE
        WHEN CAST(flow_l_min AS DOUBLE) < 0.0 THEN NULL
        WHEN device = 'room_air' THEN 0.22
        WHEN device = 'nasal_cannula' THEN
            LEAST(COALESCE(0.25 + 0.05 * CAST(flow_l_min AS DOUBLE), 0.55), 0.55)
        WHEN device = 'simple_mask' THEN 0.65
        WHEN device = 'venturi_mask' THEN 0.61
        WHEN device IN ('reservoir_mask', 'high_flow_nasal', 'cpap', 'niv', 'invasive_ventilation',
                        'tracheostomy_mask') THEN 1.00
    END AS DOUBLE);

-- device_fio2_expected(device, flow_l_min)
--   Formula: room_air 0.21; nasal_cannula 0.20 + 0.04 Q (1 L/min 0.24 ... 6 L/min 0.44), kept within
--            [device_fio2_min, device_fio2_max] (NULL when Q is not recorded); simple_mask 0.45 and
--            reservoir_mask 0.75 (midpoints of the typical 0.35-0.55 and 0.60-0.90); venturi_mask and the
--            set-FiO2 devices NULL: their expected FiO2 is the labelled or set value itself
--   Units:   device code, flow Q in L/min -> FiO2 fraction
--   Valid:   canonical device codes; flow >= 0 or NULL
--   Source:  nasal cannula: bedside rule of about 4 % per L/min (24 % at 1 L/min to 44 % at 6 L/min);
--            masks: BTS guideline 2017 (O'Driscoll BR et al., Thorax 72 Suppl 1) flow ranges
--   Status:  common practice
CREATE OR REPLACE TEMP MACRO device_fio2_expected(device, flow_l_min) AS
    CAST(CASE
        WHEN CAST(flow_l_min AS DOUBLE) < 0.0 THEN NULL
        WHEN device = 'room_air' THEN 0.21
        WHEN device = 'nasal_cannula' AND flow_l_min IS NOT NULL THEN
            GREATEST(device_fio2_min(device, flow_l_min),
                     LEAST(device_fio2_max(device, flow_l_min), 0.20 + 0.04 * CAST(flow_l_min AS DOUBLE)))
        WHEN device = 'simple_mask' THEN 0.45
        WHEN device = 'reservoir_mask' THEN 0.75
    END AS DOUBLE);

-- venturi_labelled_fio2(fio2)
--   Formula: the labelled Venturi setting (0.24, 0.28, 0.31, 0.35, 0.40, 0.50, 0.60) within 0.01 of the
--            documented FiO2, else NULL (the 0.0000001 above 0.01 absorbs binary rounding of e.g. 0.29)
--   Units:   FiO2 fraction -> FiO2 fraction
--   Valid:   any
--   Source:  settings printed on fixed-performance (Venturi) valves; map by percentage, never by colour
--   Status:  from memory
CREATE OR REPLACE TEMP MACRO venturi_labelled_fio2(fio2) AS
    CAST(CASE
        WHEN abs(CAST(fio2 AS DOUBLE) - 0.24) <= 0.0100001 THEN 0.24
        WHEN abs(CAST(fio2 AS DOUBLE) - 0.28) <= 0.0100001 THEN 0.28
        WHEN abs(CAST(fio2 AS DOUBLE) - 0.31) <= 0.0100001 THEN 0.31
        WHEN abs(CAST(fio2 AS DOUBLE) - 0.35) <= 0.0100001 THEN 0.35
        WHEN abs(CAST(fio2 AS DOUBLE) - 0.40) <= 0.0100001 THEN 0.40
        WHEN abs(CAST(fio2 AS DOUBLE) - 0.50) <= 0.0100001 THEN 0.50
        WHEN abs(CAST(fio2 AS DOUBLE) - 0.60) <= 0.0100001 THEN 0.60
    END AS DOUBLE);

-- venturi_min_flow_l_min(fio2)
--   Formula: minimum oxygen flow printed for the labelled setting venturi_labelled_fio2(fio2):
--            24 % 2, 28 % 4, 31 % 6, 35 % 8, 40 % 10, 50 % 12, 60 % 15 L/min; NULL when not a labelled setting
--   Units:   FiO2 fraction -> L/min
--   Valid:   any
--   Source:  values commonly printed on Venturi valves; 28 % at 4 L/min as in the BTS guideline 2017
--            (O'Driscoll BR et al., Thorax 72 Suppl 1)
--   Status:  from memory (28 % at 4 L/min verified)
CREATE OR REPLACE TEMP MACRO venturi_min_flow_l_min(fio2) AS
    CAST(CASE venturi_labelled_fio2(fio2)
        WHEN 0.24 THEN 2.0
        WHEN 0.28 THEN 4.0
        WHEN 0.31 THEN 6.0
        WHEN 0.35 THEN 8.0
        WHEN 0.40 THEN 10.0
        WHEN 0.50 THEN 12.0
        WHEN 0.60 THEN 15.0
    END AS DOUBLE);
