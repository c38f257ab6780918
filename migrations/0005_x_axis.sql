-- What a series' x measures and its unit, as configured (`x_name`,
-- `x_unit`), so that the report and the HTTP overview label axes and
-- slopes ("mg/kg per m") from the store alone. NULL: not configured; x is
-- then read as decimal years when its range says so, else as recorded.
-- Kept equal to the configuration at every start and reload.
ALTER TABLE series ADD COLUMN x_name TEXT;
ALTER TABLE series ADD COLUMN x_unit TEXT;
