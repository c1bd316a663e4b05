//! The CSV row decoder and record typing on arbitrary bytes, through the same length-capped
//! reader the daemon uses: no panic, every row either a record or a located reject. (Line
//! numbers count newlines: a file with bare-CR line ends reports its rows on line 1, as the fuzzer
//! found; such files are not supported, see the README.)
#![no_main]
use libfuzzer_sys::fuzz_target;
use riskbound::ingest::reader::CappedLines;
use riskbound::ingest::records::{decode_records, Columns};
use riskbound::ingest::Format;

fuzz_target!(|data: &[u8]| {
    let cols = Columns { id: "id", time: "t", value: "p", features: &[] };
    let capped = CappedLines::new(data, 4096);
    let _ = decode_records(capped, Format::Csv, "fuzz.csv", &cols, 4096, |r| assert!(r.line >= 1), |r| assert!(!r.message.is_empty()));
});
