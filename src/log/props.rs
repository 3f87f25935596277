//! Hostile input: random bytes and random mutations of a valid log must give Ok or an error,
//! never a panic or a hang (proptest reports a panic as a failure; every loop in the reader
//! consumes input, so a test that returns shows it terminates on that input).

use super::{LogReader, Progress, ReadOptions};
use proptest::prelude::*;

const VALID: &str = "episode,step,reward,terminated,truncated,value,next_value,score_0,score_1\n\
    a,0,1.5,0,0,0.2,,0.1,-0.3\n\
    b,0,-2,0,0,0.4,,0.5,0.5\n\
    a,1,0.25,0,1,0.1,3.0,1,2\n\
    b,1,1e3,1,0,0.3,,-1,0\n\
    c,0,7,0,0,1,,0,0\n";

/// Reads everything; returns the number of episodes or the error text.
fn read_all(bytes: Vec<u8>) -> Result<usize, String> {
    let opts = ReadOptions {
        progress: Progress::Hidden,
        ..ReadOptions::default()
    };
    let mut r = LogReader::from_reader(
        Box::new(std::io::Cursor::new(bytes)),
        "fuzz.csv",
        &opts,
        None,
    )
    .map_err(|e| e.to_string())?;
    let mut n = 0;
    while let Some(ep) = r.next_episode().map_err(|e| e.to_string())? {
        assert!(!ep.rewards.is_empty());
        assert_eq!(ep.scores.len(), ep.len() * ep.score_dim);
        assert!(ep.rewards.iter().all(|x| x.is_finite()));
        n += 1;
    }
    Ok(n)
}

#[derive(Debug, Clone)]
enum Edit {
    Flip(usize, u8),
    Insert(usize, u8),
    Delete(usize),
    Duplicate(usize, usize),
}

fn edit() -> impl Strategy<Value = Edit> {
    prop_oneof![
        (any::<usize>(), any::<u8>()).prop_map(|(i, b)| Edit::Flip(i, b)),
        (
            any::<usize>(),
            prop::sample::select(b",\n\r\"0.-e9 a".to_vec())
        )
            .prop_map(|(i, b)| Edit::Insert(i, b)),
        any::<usize>().prop_map(Edit::Delete),
        (any::<usize>(), 1usize..40).prop_map(|(i, n)| Edit::Duplicate(i, n)),
    ]
}

fn apply(mut bytes: Vec<u8>, edits: &[Edit]) -> Vec<u8> {
    for e in edits {
        let n = bytes.len().max(1);
        match *e {
            Edit::Flip(i, b) if !bytes.is_empty() => bytes[i % n] = b,
            Edit::Insert(i, b) => bytes.insert(i % (bytes.len() + 1), b),
            Edit::Delete(i) if !bytes.is_empty() => {
                bytes.remove(i % n);
            }
            Edit::Duplicate(i, len) if !bytes.is_empty() => {
                let start = i % n;
                let end = (start + len).min(bytes.len());
                let piece = bytes[start..end].to_vec();
                bytes.splice(start..start, piece);
            }
            _ => {}
        }
    }
    bytes
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 2000, ..ProptestConfig::default() })]

    #[test]
    fn random_bytes_never_panic(bytes in prop::collection::vec(any::<u8>(), 0..400)) {
        let _ = read_all(bytes);
    }

    #[test]
    fn mutated_logs_never_panic(edits in prop::collection::vec(edit(), 1..8)) {
        let bytes = apply(VALID.as_bytes().to_vec(), &edits);
        if let Err(msg) = read_all(bytes) {
            // Every error names the file.
            prop_assert!(msg.starts_with("fuzz.csv"), "{msg}");
        }
    }
}

#[test]
fn the_unmutated_log_reads() {
    assert_eq!(read_all(VALID.as_bytes().to_vec()), Ok(3));
}
