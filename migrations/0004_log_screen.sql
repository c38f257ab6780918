-- The ln(y) screen's running state after the series' latest fit, so that a
-- series resumes it without walking all its points back from the store
-- (after a restart, a failed transaction, or a verdict on another series).
-- 64 bytes: n, then the x origin, the two means and the four sums of
-- squares, little-endian; an empty blob when the screen is off (some y at
-- or below zero); NULL when not kept (a transformed or windowed series, or
-- after a verdict or window change on the series): it is then rebuilt
-- from the points. `verify` recomputes it from the stored records.
ALTER TABLE series ADD COLUMN log_screen BLOB;
