//! State written by the previous layout (predictions indexed by state and time, the number
//! waiting counted from the table, no stored expiry cutoff) is upgraded in place when a newer
//! build opens it, and the join goes on as if nothing happened: the same random files as
//! tests/join_model.rs, the first part through the store, the database then rewritten to the
//! old layout, the rest through the reopened store, compared with the map model after every file.

mod common;

use common::join_model::{model_config, ops_from_bytes, split_like_store, store_outcome, Model};
use common::TempDir;
use proptest::prelude::*;
use riskbound::window::Store;

/// Rewrites the database to the layout of the build before: what an upgrade finds on disk.
fn downgrade(db: &std::path::Path) {
    let c = rusqlite::Connection::open(db).unwrap();
    c.execute_batch(
        "DROP INDEX pred_time;
         CREATE INDEX pred_waiting ON pred (model, state, t_pred);
         DELETE FROM counter WHERE name = 'awaiting';
         UPDATE model_meta SET expired_to = NULL;
         PRAGMA user_version = 0;",
    )
    .unwrap();
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(60))]

    #[test]
    fn an_old_layout_is_upgraded_and_the_join_goes_on(
        data in prop::collection::vec(any::<u8>(), 0..300),
        cut in 0usize..40,
    ) {
        let dir = TempDir::new("upgrade");
        let cfg = model_config();
        let mut model = Model::default();
        let files = ops_from_bytes(&data);
        let cut = cut.min(files.len());
        let mut store = Store::open(&dir.0).unwrap();
        for (n, file) in files.iter().enumerate() {
            if n == cut {
                drop(store);
                downgrade(&dir.path("riskbound.sqlite"));
                store = Store::open(&dir.0).unwrap();
            }
            let got = store_outcome(&mut store, &cfg, n, file);
            for part in split_like_store(file) {
                model.file(&part);
            }
            prop_assert_eq!(&got, model.outcome(), "after file {} (upgraded before file {})", n, cut);
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(40))]

    /// The windows are cut from samples kept in memory and pruned in step with the database;
    /// after every file they must equal the same windows read back by a store that has just
    /// loaded the database, and so must everything kept (or pruning differs and memory grows).
    /// Predictions every 700 ms, each labelled in a later file: many more samples than the
    /// windows hold, so pruning runs on most files.
    #[test]
    fn windows_kept_in_memory_equal_the_database(data in prop::collection::vec(any::<u8>(), 1..200)) {
        use riskbound::config::{WindowConfig, WindowKind};
        use riskbound::ingest::records::Record;
        use riskbound::window::{Batch, Kind};
        let dir = TempDir::new("kept");
        let mut cfg = model_config();
        cfg.windows = vec![
            WindowConfig { name: "last".into(), kind: WindowKind::Last(5), mature: false },
            WindowConfig { name: "span".into(), kind: WindowKind::SpanMs(4_000), mature: false },
        ];
        let everything = WindowConfig { name: "everything kept".into(), kind: WindowKind::Last(u64::MAX / 4), mature: false };
        let mut store = Store::open(&dir.0).unwrap();
        let rec = |id: usize, t: i64, v: u8| Record {
            line: 2,
            id: format!("k{id}"),
            time_ms: t,
            value: if v & 1 == 0 { "a".into() } else { "b".into() },
            features: Vec::new(),
        };
        let mut unlabelled: Vec<(usize, i64)> = Vec::new();
        let mut next = 0usize;
        for (n, &b) in data.iter().enumerate() {
            let batch: Vec<Record> = if n % 2 == 0 {
                (0..1 + b as usize % 4)
                    .map(|_| {
                        next += 1;
                        unlabelled.push((next, next as i64 * 700));
                        rec(next, next as i64 * 700, b >> 3)
                    })
                    .collect()
            } else {
                // Label a few of the waiting ones, not always the oldest first.
                let take = (1 + b as usize % 3).min(unlabelled.len());
                let from = if b & 4 == 0 { 0 } else { unlabelled.len() - take };
                unlabelled.drain(from..from + take).map(|(id, t)| rec(id, t + 300, b >> 5)).collect()
            };
            let kind = if n % 2 == 0 { Kind::Prediction } else { Kind::Label };
            let hash = format!("file-{n}");
            let file = Batch { kind, name: "f", hash: &hash, records: &batch, rejects: &[], size: None, mtime_ns: None };
            store.ingest_file(&cfg, &file, 0).unwrap();
            let fresh = Store::open(&dir.0).unwrap();
            for w in cfg.windows.iter().chain([&everything]) {
                let a = store.window_losses("m", w.kind).unwrap();
                let b = fresh.window_losses("m", w.kind).unwrap();
                prop_assert_eq!(&a, &b, "window {} after file {}", w.name, n);
            }
        }
    }
}
