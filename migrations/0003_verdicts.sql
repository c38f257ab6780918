-- Verdicts on findings, exclusions, and the fits they trigger.
-- Rules: migrations are append-only; a shipped file is never edited.

-- An analyst's verdict on a finding, or the revert of an earlier verdict.
-- Rows are only ever added: a revert is a new row citing the one it undoes.
CREATE TABLE verdicts (
    id             INTEGER PRIMARY KEY,
    finding_id     INTEGER NOT NULL REFERENCES findings(id),
    verdict        TEXT    NOT NULL CHECK (verdict IN ('confirmed', 'corrected', 'excluded', 'reverted')),
    record_row     INTEGER REFERENCES records(id),   -- the record the finding concerns
    new_record_row INTEGER REFERENCES records(id),   -- corrected: the new version stored
    value          REAL,                             -- corrected: the value as given
    reverts        INTEGER REFERENCES verdicts(id),  -- reverted: the verdict undone
    note           TEXT    NOT NULL,
    by_whom        TEXT    NOT NULL,
    at             TEXT    NOT NULL
);
CREATE INDEX verdicts_by_finding ON verdicts(finding_id);

-- A record excluded from its series' fit by a verdict (it stays stored).
ALTER TABLE records ADD COLUMN excluded INTEGER NOT NULL DEFAULT 0;

-- A fit version made by a verdict (or its revert) cites it.
ALTER TABLE fits ADD COLUMN trigger_verdict INTEGER REFERENCES verdicts(id);

-- Bumped by every change made outside the ingest path (a verdict), so
-- that a running daemon reloads what it keeps in memory.
CREATE TABLE store_revision (n INTEGER NOT NULL);
INSERT INTO store_revision (n) VALUES (0);

-- Analysis windows: which of a series' points its fit uses (an x range,
-- the last N records, or since a date). One row per change, from the
-- `window` command or from the configuration; the newest row of a series
-- whose source is 'command' overrides the configuration.
CREATE TABLE series_windows (
    id           INTEGER PRIMARY KEY,
    series_id    INTEGER NOT NULL REFERENCES series(id),
    window       TEXT,                      -- e.g. 'x:1.5..200', 'last:40', 'since:2015-01-01'; NULL: all points
    source       TEXT    NOT NULL CHECK (source IN ('command', 'config')),
    note         TEXT    NOT NULL,
    by_whom      TEXT    NOT NULL,
    at           TEXT    NOT NULL
);
CREATE INDEX series_windows_by_series ON series_windows(series_id);

-- The window a fit version used (NULL: all points), and the window change
-- that triggered it.
ALTER TABLE fits ADD COLUMN window TEXT;
ALTER TABLE fits ADD COLUMN trigger_window INTEGER REFERENCES series_windows(id);
