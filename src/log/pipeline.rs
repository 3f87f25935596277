//! The producer side of the reader: a thread that cuts the input into blocks and parses each
//! batch of blocks in parallel (rayon), handing parsed blocks over in file order through a
//! bounded channel. The consumer (episode assembly, and whatever the caller does with each
//! episode) thus overlaps with parsing. Spent blocks travel back for reuse.

use super::chunks::{ChunkError, Chunker};
use super::rows::{Parsed, RowParser};
use rayon::prelude::*;
use std::sync::Arc;
use std::sync::mpsc::{Receiver, SyncSender, sync_channel};
use std::thread::JoinHandle;

/// What the producer sends: a parsed block, or a read error (then it stops).
pub enum Item {
    Block(Parsed),
    ReadError(ChunkError),
}

/// Blocks cut and parsed together (two per thread); [`super::chunks::Tuning::for_budget`]
/// counts the blocks in flight from it: this batch, one batch in the channel, up to two
/// batches of spare parsed buffers, and the consumer's one or two.
pub fn batch() -> usize {
    2 * rayon::current_num_threads().max(1)
}

pub struct Pipeline {
    rx: Receiver<Item>,
    spare_tx: SyncSender<Parsed>,
    handle: Option<JoinHandle<Chunker>>,
}

impl Pipeline {
    pub fn start(mut chunker: Chunker, parser: Arc<RowParser>) -> Pipeline {
        let batch = batch();
        // Parsed blocks are charged here, before they queue, so the blocks in flight count.
        let budget = chunker.budget().cloned();
        let (tx, rx) = sync_channel::<Item>(batch);
        let (spare_tx, spare_rx) = sync_channel::<Parsed>(2 * batch);
        let handle = std::thread::spawn(move || {
            let mut buffers: Vec<Parsed> = Vec::new();
            'outer: loop {
                let mut blocks = Vec::with_capacity(batch);
                while blocks.len() < batch {
                    match chunker.next_block() {
                        Ok(Some(b)) => blocks.push(b),
                        Ok(None) => break,
                        Err(e) => {
                            let _ = tx.send(Item::ReadError(e));
                            break 'outer;
                        }
                    }
                }
                if blocks.is_empty() {
                    break;
                }
                buffers.extend(spare_rx.try_iter());
                let mut parsed: Vec<Parsed> = (0..blocks.len())
                    .map(|_| buffers.pop().unwrap_or_default())
                    .collect();
                parsed
                    .par_iter_mut()
                    .zip(blocks.par_iter())
                    .for_each(|(out, b)| {
                        parser.parse_into(&b.bytes, b.first_line, out);
                        out.tail = b.tail;
                        if let Some(budget) = &budget {
                            out.settle(budget);
                        }
                    });
                for b in blocks {
                    chunker.recycle(b.bytes);
                }
                for p in parsed {
                    // The consumer hung up (it hit an error or was dropped): stop reading.
                    if tx.send(Item::Block(p)).is_err() {
                        break 'outer;
                    }
                }
            }
            chunker
        });
        Pipeline {
            rx,
            spare_tx,
            handle: Some(handle),
        }
    }

    /// The next item in file order, or None when the input is exhausted.
    pub fn next(&self) -> Option<Item> {
        self.rx.recv().ok()
    }

    /// Gives a spent block back for reuse (dropped if the producer has enough).
    pub fn recycle(&self, block: Parsed) {
        let _ = self.spare_tx.try_send(block);
    }

    /// Stops the producer and returns the chunker (to drain the rest of the stream).
    pub fn stop(mut self) -> Option<Chunker> {
        let Pipeline { rx, handle, .. } = &mut self;
        // Unblock a producer waiting on a full channel, then let it see the hang-up.
        while rx.try_recv().is_ok() {}
        let (dead_tx, dead_rx) = sync_channel(0);
        drop(dead_tx);
        *rx = dead_rx;
        handle.take().and_then(|h| h.join().ok())
    }
}

impl Drop for Pipeline {
    fn drop(&mut self) {
        // Replacing the receiver hangs up on the producer; joining reclaims the thread.
        let (dead_tx, dead_rx) = sync_channel(0);
        drop(dead_tx);
        self.rx = dead_rx;
        if let Some(h) = self.handle.take() {
            let _ = h.join();
        }
    }
}
