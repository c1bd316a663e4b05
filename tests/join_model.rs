//! The SQLite join against the simple map model of tests/common/join_model.rs, on random
//! sequences of prediction and label files (proptest). Every counter, the number waiting and
//! the joined losses in order must agree after every file.

mod common;

use common::join_model::{model_config, ops_from_bytes, split_like_store, store_outcome, Model};
use proptest::prelude::*;
use riskbound::window::Store;

proptest! {
    #![proptest_config(ProptestConfig::with_cases(400))]

    #[test]
    fn store_and_model_agree(data in prop::collection::vec(any::<u8>(), 0..400)) {
        let cfg = model_config();
        let mut store = Store::open_in_memory().unwrap();
        let mut model = Model::default();
        for (n, file) in ops_from_bytes(&data).iter().enumerate() {
            let got = store_outcome(&mut store, &cfg, n, file);
            for part in split_like_store(file) {
                model.file(&part);
            }
            prop_assert_eq!(&got, model.outcome(), "after file {}", n);
        }
    }
}
