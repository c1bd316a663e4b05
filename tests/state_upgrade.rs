//! State written by the previous layouts (predictions indexed by state and time, the number
//! waiting counted from the table, no stored expiry cutoff, no sampling levels) is upgraded in place when a newer
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
         DROP INDEX sample_level;
         DROP INDEX pred_count_level;
         ALTER TABLE sample DROP COLUMN level;
         CREATE TABLE pred_count_3 (model TEXT NOT NULL, sec INTEGER NOT NULL, n INTEGER NOT NULL,
             PRIMARY KEY (model, sec)) WITHOUT ROWID;
         INSERT INTO pred_count_3 SELECT model, sec, SUM(n) FROM pred_count GROUP BY model, sec;
         DROP TABLE pred_count;
         ALTER TABLE pred_count_3 RENAME TO pred_count;
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
