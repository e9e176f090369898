-- Demo-data faults that change the blood in the syringe, the documentation beside it or the
-- result time. Input view `faulty`: the true state of the chosen samples plus `fault` (the fault type),
-- `f_u1` (a uniform random number) and `delay_min` (late analysis). Rows whose fault is none of these
-- pass through unchanged. The analyser step (analyser_report.sql) is re-run on the result.
SELECT
    f.* REPLACE (
        CASE f.fault
            -- venous blood: the patient's venous PO2/PCO2/HCO3 (forward_model.sql)
            WHEN 'venous_as_arterial' THEN f.venous_po2
            -- air bubbles: PO2 pulled a share 0.3-0.8 of the way to the PO2 of room air
            WHEN 'air_contamination' THEN
                f.blood_po2 + (0.3 + 0.5 * f.f_u1)
                    * (inspired_po2_mmhg(0.2095, f.barometric_pressure_mmhg, water_vapour_pressure_mmhg(22.0))
                       - f.blood_po2)
            -- cells keep consuming oxygen while the syringe waits
            WHEN 'late_analysis' THEN f.blood_po2 * (1.0 - 0.0015 * f.delay_min)
            ELSE f.blood_po2
        END AS blood_po2,
        CASE f.fault
            WHEN 'venous_as_arterial' THEN f.venous_pco2
            -- room air holds almost no CO2: PCO2 falls by up to a third
            WHEN 'air_contamination' THEN f.blood_pco2 * (1.0 - 0.4 * (0.3 + 0.5 * f.f_u1))
            WHEN 'late_analysis' THEN f.blood_pco2 + 0.04 * f.delay_min
            ELSE f.blood_pco2
        END AS blood_pco2,
        CASE f.fault
            WHEN 'venous_as_arterial' THEN f.venous_hco3
            WHEN 'air_contamination' THEN f.blood_hco3 * (1.0 - 0.03 * (0.3 + 0.5 * f.f_u1))
            -- lactic acid made in the syringe titrates bicarbonate one for one
            WHEN 'late_analysis' THEN f.blood_hco3 - 0.012 * f.delay_min
            ELSE f.blood_hco3
        END AS blood_hco3,
        CASE f.fault
            -- glycolysis at room temperature: about 0.012 mmol/L per minute (domain-methods.md section 8)
            WHEN 'late_analysis' THEN f.blood_lactate + 0.012 * f.delay_min
            ELSE f.blood_lactate
        END AS blood_lactate,
        CASE f.fault
            WHEN 'late_analysis' THEN f.collected_at + to_minutes(CAST(f.delay_min AS BIGINT))
            ELSE f.resulted_at
        END AS resulted_at,
        -- oxygen given, room air charted
        CASE f.fault WHEN 'fio2_under_documented' THEN 'room_air' ELSE f.o2_device END AS o2_device,
        CASE f.fault WHEN 'fio2_under_documented' THEN 0.0 ELSE f.o2_flow_l_min END AS o2_flow_l_min,
        CASE f.fault
            WHEN 'fio2_under_documented' THEN 0.21
            -- an FiO2 the charted device and flow cannot deliver: 0.10-0.35 above its plausible maximum,
            -- or, where the maximum is above 0.8 (reservoir mask), 0.10-0.25 below its minimum
            WHEN 'fio2_device_mismatch' THEN
                CASE WHEN device_fio2_max(f.o2_device, f.o2_flow_l_min) <= 0.8 THEN
                         round(least(1.0, device_fio2_max(f.o2_device, f.o2_flow_l_min) + 0.10 + 0.25 * f.f_u1), 2)
                     ELSE round(greatest(0.21, device_fio2_min(f.o2_device, f.o2_flow_l_min) - 0.10 - 0.15 * f.f_u1), 2)
                END
            ELSE f.fio2
        END AS fio2
    )
FROM faulty AS f
