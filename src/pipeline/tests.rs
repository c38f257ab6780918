#![allow(clippy::unwrap_used)]
//! A file computed while the one before it commits checks, inside its
//! own transaction, everything it assumed; each wrong assumption rolls
//! it back whole.
use super::cache::KeptPairs;
use super::*;

fn quarterly(n: usize) -> Vec<(f64, f64)> {
    (0..n)
        .map(|i| {
            let x = 2010.0 + i as f64 * 0.25;
            // Rounded, with a wobble, so that slopes tie now and then.
            (
                x,
                ((5.0 + 0.2 * (x - 2010.0) + ((i * 7) % 5) as f64 * 0.3) * 10.0).round() / 10.0,
            )
        })
        .collect()
}

/// Kept slopes give the row computed from scratch (`robust_row`, whose
/// Theil-Sen and Mann-Kendall are checked against scipy in
/// tests/reference_robust.rs), file after file.
#[test]
fn kept_pairwise_slopes_give_the_robust_row_from_scratch() {
    let mut kept = KeptPairs::default();
    let all = quarterly(100);
    for n in [3, 4, 9, 10, 40, 99, 100] {
        let row = kept.robust("W-1/nitrate", &all[..n], 0.95, 1_000_000);
        assert_eq!(row, Some(robust_row(&all[..n], 0.95)), "n = {n}");
    }
    assert_eq!(kept.held, 4_950);
    // Past 100 points the series is let go, and computed from scratch.
    let longer = quarterly(101);
    assert_eq!(kept.robust("W-1/nitrate", &longer, 0.95, 1_000_000), None);
    assert_eq!((kept.series.len(), kept.held), (0, 0));
}

/// The bound on slopes held: no series is kept past it, and the one
/// that grows past it still gets its row, then is let go.
#[test]
fn kept_pairwise_slopes_stay_within_their_bound() {
    let mut kept = KeptPairs::default();
    let a = quarterly(15);
    // 10 points: 45 slopes, room under 100.
    assert!(kept.robust("A", &a[..10], 0.95, 100).is_some());
    assert_eq!(kept.held, 45);
    // 12 points more for another series (66 slopes): no room.
    assert_eq!(kept.robust("B", &a[..12], 0.95, 100), None);
    assert!(!kept.series.contains_key("B"));
    // The kept series grows to 15 points (105 slopes): its row, then gone.
    assert_eq!(kept.robust("A", &a, 0.95, 100), Some(robust_row(&a, 0.95)));
    assert_eq!((kept.series.len(), kept.held), (0, 0));
    // With room again, B is kept.
    assert!(kept.robust("B", &a[..12], 0.95, 100).is_some());
    assert_eq!(kept.held, 66);
}

/// The reading thread's lower priority is its own (the kernel's nice
/// value of that thread, read back from /proc), not the process's.
#[cfg(target_os = "linux")]
#[test]
fn a_thread_lowers_its_own_priority_only() {
    fn nice_of(stat: &str) -> i32 {
        // Fields after the command name, which is in parentheses; the
        // nice value is field 19 of the line.
        let after = &stat[stat.rfind(')').unwrap() + 2..];
        after.split(' ').nth(16).unwrap().parse().unwrap()
    }
    let own = || nice_of(&std::fs::read_to_string("/proc/thread-self/stat").unwrap());
    let before = own();
    let (inside, process) = std::thread::spawn(move || {
        lower_this_thread_priority(before + 3);
        (
            own(),
            nice_of(&std::fs::read_to_string("/proc/self/stat").unwrap()),
        )
    })
    .join()
    .unwrap();
    assert_eq!(inside, before + 3);
    assert_eq!(process, before, "the main thread keeps its priority");
    assert_eq!(own(), before);
}

fn deliver(inbox: &Path, name: &str, first_id: usize, n: usize, shift: f64) -> ReadyFile {
    let mut text = String::from("record_id,series,x,y\n");
    for i in 0..n {
        let x = 2000.0 + (first_id + i) as f64 * 0.25;
        let y = 5.0 + 0.1 * x.sin() + shift;
        text.push_str(&format!("W{:04},MW-7/nitrate,{x},{y}\n", first_id + i));
    }
    let path = inbox.join(name);
    std::fs::write(&path, text).unwrap();
    ReadyFile {
        size: std::fs::metadata(&path).unwrap().len(),
        path,
        relative: name.into(),
        modified: SystemTime::UNIX_EPOCH,
    }
}

/// A number read through a connection of its own (committed rows).
fn count(db: &Path, sql: &str) -> i64 {
    rusqlite::Connection::open(db)
        .unwrap()
        .query_row(sql, [], |r| r.get(0))
        .unwrap()
}

/// What a second file may assume after the first one committed.
fn assumed(db: &Path, cache: &SeriesCache) -> Start {
    Start::Assumed {
        revision: cache.revision.unwrap(),
        next_ids: (
            count(db, "SELECT MAX(id) + 1 FROM records"),
            count(db, "SELECT MAX(id) + 1 FROM fits"),
        ),
        file_id: crate::store::FileId(count(db, "SELECT MAX(id) + 1 FROM source_files")),
    }
}

/// Computes `file` ahead on `start` and commits; the commit's outcome.
fn ahead(
    config: &Config,
    store: &mut Store,
    cache: &mut SeriesCache,
    file: &ReadyFile,
    start: &Start,
) -> Result<(), StoreError> {
    let mut prepared = prepare(config, file, SystemTime::now());
    let tx = store.begin().unwrap();
    // A read while computing (the cache lacks the series) already
    // meets a wrong assumption; otherwise the commit does.
    write_behind(tx, None, |b| {
        match compute_ahead(b, config, cache, file, &mut prepared, start) {
            Ok(Some(_)) => b.commit(),
            Ok(None) => panic!("the file should not take the plain way"),
            // Left unended: rolled back.
            Err(PipelineError::Store(e)) => Err(e),
            Err(e) => panic!("{e}"),
        }
    })
}

/// A store holding the first file, and the second file to come.
fn setup() -> (tempfile::TempDir, Config, Store, SeriesCache) {
    let dir = tempfile::tempdir().unwrap();
    let config = Config::defaults_in(dir.path());
    std::fs::create_dir_all(&config.inbox).unwrap();
    let mut store = Store::open(&config.database).unwrap();
    let mut cache = SeriesCache::new();
    let first = deliver(&config.inbox, "a.csv", 1, 12, 0.0);
    let done = process_file(&config, &mut store, &mut cache, &first, SystemTime::now());
    assert!(matches!(done, Ok(Outcome::Ingested { .. })), "{done:?}");
    (dir, config, store, cache)
}

fn refused_whole(db: &Path, outcome: Result<(), StoreError>, what: &str) {
    match outcome {
        Err(StoreError::NotAsAssumed { what: said }) => {
            assert!(said.contains(what), "{said} should say {what}")
        }
        other => panic!("expected a wrong assumption about {what}, got {other:?}"),
    }
    assert_eq!(count(db, "SELECT COUNT(*) FROM records"), 12);
    assert_eq!(count(db, "SELECT COUNT(*) FROM source_files"), 1);
    assert_eq!(count(db, "SELECT COUNT(*) FROM fits"), 1);
}

#[test]
fn right_assumptions_commit_the_same_rows_as_reading_them() {
    let (_dir, config, mut store, mut cache) = setup();
    let start = assumed(&config.database, &cache);
    let next = deliver(&config.inbox, "b.csv", 13, 6, 0.0);
    ahead(&config, &mut store, &mut cache, &next, &start).unwrap();
    assert_eq!(count(&config.database, "SELECT COUNT(*) FROM records"), 18);
    assert_eq!(count(&config.database, "SELECT MAX(id) FROM records"), 18);
    assert_eq!(
        count(
            &config.database,
            "SELECT COUNT(*) FROM records WHERE file_id = 2"
        ),
        6
    );
    assert_eq!(count(&config.database, "SELECT MAX(version) FROM fits"), 2);
    assert!(crate::verify::verify(&store).unwrap().ok());
}

#[test]
fn a_verdict_given_meanwhile_is_caught_by_the_store_revision() {
    let (_dir, config, mut store, mut cache) = setup();
    let start = assumed(&config.database, &cache);
    let tx = store.begin().unwrap();
    tx.bump_revision().unwrap();
    tx.commit().unwrap();
    let next = deliver(&config.inbox, "b.csv", 13, 6, 0.0);
    let outcome = ahead(&config, &mut store, &mut cache, &next, &start);
    refused_whole(&config.database, outcome, "store revision");
}

#[test]
fn rows_written_meanwhile_are_caught_by_the_next_ids() {
    let (_dir, config, mut store, mut cache) = setup();
    let Start::Assumed {
        revision, file_id, ..
    } = assumed(&config.database, &cache)
    else {
        unreachable!()
    };
    let next = deliver(&config.inbox, "b.csv", 13, 6, 0.0);
    // As if the file before had written one record fewer.
    let start = Start::Assumed {
        revision,
        next_ids: (12, 2),
        file_id,
    };
    let outcome = ahead(&config, &mut store, &mut cache, &next, &start);
    refused_whole(&config.database, outcome, "next row ids");
    // As if it had taken another file id.
    let mut cache = SeriesCache::new();
    let start = Start::Assumed {
        revision,
        next_ids: (13, 2),
        file_id: crate::store::FileId(file_id.0 + 1),
    };
    let outcome = {
        let tx = store.begin().unwrap();
        let revision_read = tx.revision().unwrap();
        drop(tx);
        cache.revision = Some(revision_read);
        ahead(&config, &mut store, &mut cache, &next, &start)
    };
    refused_whole(&config.database, outcome, "file id");
}

#[test]
fn a_large_file_is_stored_from_disk_and_set_aside_if_it_changes_meanwhile() {
    let (_dir, config, mut store, mut cache) = setup();
    let db = config.database.clone();
    // Above LARGE_FILE_BYTES, so read from disk in pieces, twice.
    let big = deliver(&config.inbox, "big.csv", 100, 100_000, 0.0);
    assert!(big.size > LARGE_FILE_BYTES, "{}", big.size);
    let bytes = std::fs::read(&big.path).unwrap();
    let sha = hex::encode(<sha2::Sha256 as sha2::Digest>::digest(&bytes));
    let prepared = prepare(&config, &big, SystemTime::now());
    assert!(prepared.large.is_some() && prepared.parsed.is_none());
    assert!(
        matches!(&prepared.read, Ok((h, n, b)) if *h == sha && *n == big.size && b.is_empty()),
        "hashed on the first read, not held: {:?}",
        prepared.read.as_ref().map(|(h, n, b)| (h, n, b.len()))
    );
    let (done, _) = process_prepared(&config, &mut store, &mut cache, &big, prepared);
    assert!(matches!(done, Ok(Outcome::Ingested { .. })), "{done:?}");
    assert_eq!(count(&db, "SELECT count(*) FROM records"), 12 + 100_000);
    let stored: String = rusqlite::Connection::open(&db)
        .unwrap()
        .query_row(
            "SELECT sha256 FROM source_files WHERE name = 'big.csv'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(stored, sha);

    // The same size, one value changed in the last row after the first
    // read: the second read hashes differently and nothing is stored.
    let late = deliver(&config.inbox, "late.csv", 200_000, 100_000, 1.0);
    let prepared = prepare(&config, &late, SystemTime::now());
    let mut text = std::fs::read(&late.path).unwrap();
    let at = text.len() - 2;
    text[at] = if text[at] == b'1' { b'2' } else { b'1' };
    {
        use std::io::Write;
        let mut f = std::fs::OpenOptions::new()
            .write(true)
            .open(&late.path)
            .unwrap();
        f.write_all(&text).unwrap();
    }
    let (done, _) = process_prepared(&config, &mut store, &mut cache, &late, prepared);
    match done {
        Ok(Outcome::Quarantined { reason, .. }) => assert!(
            reason.contains("changed while it was being read"),
            "{reason}"
        ),
        other => panic!("{other:?}"),
    }
    assert_eq!(count(&db, "SELECT count(*) FROM records"), 12 + 100_000);
    assert_eq!(
        count(
            &db,
            "SELECT count(*) FROM source_files WHERE outcome = 'quarantined'"
        ),
        1
    );
}

#[test]
fn a_stored_id_in_the_middle_of_a_statement_leaves_nothing_of_the_file() {
    // Bulk INSERTs run OR FAIL: the rows before the failing one in the
    // same statement are written, then go with the transaction.
    let (_dir, config, mut store, mut cache) = setup();
    let start = assumed(&config.database, &cache);
    // 40 new records (more than a statement's 32 rows), W0012 among
    // the first 32.
    let next = deliver(&config.inbox, "b.csv", 13, 40, 0.0);
    let text = std::fs::read_to_string(&next.path).unwrap();
    let mut lines: Vec<&str> = text.lines().collect();
    lines.insert(11, "W0012,MW-7/nitrate,2003.0,5.0");
    std::fs::write(&next.path, lines.join("\n") + "\n").unwrap();
    let next = ReadyFile {
        size: std::fs::metadata(&next.path).unwrap().len(),
        ..next
    };
    let outcome = ahead(&config, &mut store, &mut cache, &next, &start);
    refused_whole(&config.database, outcome, "record ids is stored already");
    assert_eq!(
        count(
            &config.database,
            "SELECT COUNT(*) FROM records WHERE file_id = 2"
        ),
        0
    );
}

#[test]
fn records_or_content_stored_already_are_caught() {
    let (_dir, config, mut store, mut cache) = setup();
    let start = assumed(&config.database, &cache);
    // W0012 again, then new ones: the file takes the way of a
    // resubmission instead.
    let overlapping = deliver(&config.inbox, "b.csv", 12, 6, 0.0);
    let outcome = ahead(&config, &mut store, &mut cache, &overlapping, &start);
    refused_whole(&config.database, outcome, "record ids is stored already");
    // The first file's bytes under another name.
    let mut cache = SeriesCache::new();
    cache.revision = match start {
        Start::Assumed { revision, .. } => Some(revision),
        Start::Read => None,
    };
    let again = deliver(&config.inbox, "c.csv", 1, 12, 0.0);
    let outcome = ahead(&config, &mut store, &mut cache, &again, &start);
    refused_whole(&config.database, outcome, "same content is stored as a.csv");
}
