//! The parse floor of the Performance section: one thread reading a CSV log with the csv crate
//! (`ByteRecord`, no allocation per row) and parsing every numeric field with fast-float2,
//! summing them so nothing is optimised away. Not a criterion bench: it times one pass over
//! the file named by its first argument (run it under `/usr/bin/time -v`):
//!
//! ```sh
//! cargo bench --bench csv_floor -- bench-data/rover_1m.csv
//! ```

use std::time::Instant;

fn main() {
    let Some(path) = std::env::args().skip(1).find(|a| !a.starts_with("--")) else {
        eprintln!("usage: cargo bench --bench csv_floor -- FILE.csv");
        std::process::exit(2);
    };
    let start = Instant::now();
    let mut reader = csv::ReaderBuilder::new()
        .buffer_capacity(1 << 20)
        .from_path(&path)
        .unwrap_or_else(|e| panic!("{path}: {e}"));
    let mut record = csv::ByteRecord::new();
    let (mut rows, mut numbers, mut sum) = (0u64, 0u64, 0.0f64);
    while reader
        .read_byte_record(&mut record)
        .unwrap_or_else(|e| panic!("{path}: {e}"))
    {
        rows += 1;
        for field in record.iter() {
            if let Ok(x) = fast_float2::parse::<f64, _>(field) {
                numbers += 1;
                sum += x;
            }
        }
    }
    let secs = start.elapsed().as_secs_f64();
    println!(
        "csv_floor {path}: {rows} rows, {numbers} numbers (sum {sum:.6e}) in {secs:.3} s, one thread"
    );
}
