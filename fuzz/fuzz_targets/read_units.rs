//! Any bytes as a labeled file and as a pool file: `read_units` must return a table or an
//! error, never panic, hang or allocate without bound. Complements the seeded mutation test
//! in tests/reader_mutations.rs, which CI runs.
#![no_main]

use std::io::Write;

use libfuzzer_sys::fuzz_target;
use weighbridge::table::{read_units, ReadOptions, Role};

fuzz_target!(|data: &[u8]| {
    let mut file = tempfile::NamedTempFile::new().expect("temporary file");
    file.write_all(data).expect("write");
    let mut options = ReadOptions::new("pred");
    options.features = vec!["f1..f5".to_string()];
    options.weight_column = Some("w".to_string());
    let _ = read_units(file.path(), Role::Pool, &options);
    options.outcome = Some("y".to_string());
    let _ = read_units(file.path(), Role::Labeled, &options);
});
