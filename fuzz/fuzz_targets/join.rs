//! The label/prediction join in SQLite against the simple map model (shared with the proptest
//! tests/join_model.rs): every counter and the joined losses in order agree after every file.
#![no_main]
use libfuzzer_sys::fuzz_target;

#[path = "../../tests/common/join_model.rs"]
mod join_model;

use join_model::{model_config, ops_from_bytes, split_like_store, store_outcome, Model};

fuzz_target!(|data: &[u8]| {
    let cfg = model_config();
    let mut store = riskbound::window::Store::open_in_memory().unwrap();
    let mut model = Model::default();
    for (n, file) in ops_from_bytes(data).iter().enumerate() {
        let got = store_outcome(&mut store, &cfg, n, file);
        for part in split_like_store(file) {
            model.file(&part);
        }
        assert_eq!(&got, model.outcome(), "after file {n}");
    }
});
