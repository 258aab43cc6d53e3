//! Makes decoded clips durable off the decoding threads.
//!
//! A decoded clip is done when its frame store and then its record are synced
//! and renamed into place. Each sync waits for the disk (about half a
//! millisecond per file on the development machine, two files per clip), and
//! a worker that waits decodes nothing; with one worker per core, as a
//! partition of a cluster run has, that is a few percent of the stage lost,
//! and more when several processes share a disk. So a worker hands its
//! finished clip to one committing thread and goes on with the next clip.
//! The thread commits clips in the order they arrive, each exactly as before
//! (frames synced and renamed, then the record), so a clip's record still
//! never appears before its frames. A bounded queue keeps at most a few
//! unfinished clips open at once.

use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc::{SyncSender, sync_channel};

use crate::store::{ClipRecord, FrameWriter, write_json_atomic};

/// Clips a worker may hand over before it waits for the committing thread.
const QUEUE_CLIPS: usize = 4;

/// A decoded clip whose files are not yet under their final names.
pub(super) struct Pending {
    /// The clip's position in the stage's list of selected clips.
    pub index: usize,
    /// The clip's frame store, all frames written.
    pub writer: FrameWriter,
    /// The clip's record, written after the frames are in place.
    pub record: ClipRecord,
    /// Where the record goes.
    pub record_path: PathBuf,
}

/// What became of a handed-over clip.
#[derive(Debug, PartialEq)]
pub(super) enum Committed {
    /// Frames and record are in place.
    Done,
    /// The stage was stopped before this clip's commit began; nothing of it
    /// was written under a final name.
    Cancelled,
    /// Syncing or renaming failed; the reason names the file.
    Failed(String),
}

/// Runs `work` with a sender for finished clips while one thread commits them;
/// returns `work`'s result and each handed-over clip's outcome (by index).
/// A clip still queued when `stop` is set is dropped (its temporary file is
/// removed); `on_failure` is called on the committing thread when a commit
/// fails, so it can stop the stage at once.
pub(super) fn with_committer<R>(
    stop: &AtomicBool,
    on_failure: &(dyn Fn(usize, &str) + Sync),
    work: impl FnOnce(&SyncSender<Pending>) -> R,
) -> (R, Vec<(usize, Committed)>) {
    std::thread::scope(|scope| {
        let (sender, receiver) = sync_channel::<Pending>(QUEUE_CLIPS);
        let committer = scope.spawn(move || {
            let mut outcomes = Vec::new();
            for pending in receiver {
                let index = pending.index;
                let outcome = if stop.load(Ordering::SeqCst) {
                    // Dropping the writer removes its temporary file.
                    Committed::Cancelled
                } else {
                    match commit(pending) {
                        Ok(()) => Committed::Done,
                        Err(reason) => {
                            on_failure(index, &reason);
                            Committed::Failed(reason)
                        }
                    }
                };
                outcomes.push((index, outcome));
            }
            outcomes
        });
        let result = work(&sender);
        drop(sender);
        let outcomes = committer
            .join()
            .expect("the committing thread does not panic");
        (result, outcomes)
    })
}

/// Syncs and renames the frame store, then writes the record atomically.
fn commit(pending: Pending) -> Result<(), String> {
    pending.writer.finish().map_err(|e| e.to_string())?;
    write_json_atomic(&pending.record_path, &pending.record)
        .map_err(|e| format!("{}: {e}", pending.record_path.display()))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pending(dir: &std::path::Path, index: usize, record_path: PathBuf) -> Pending {
        let mut writer = FrameWriter::create(&dir.join(format!("{index}.frames")), 2, 1).unwrap();
        writer.push(&[1, 2, 3, 4, 5, 6]).unwrap();
        Pending {
            index,
            writer,
            record: record(),
            record_path,
        }
    }

    fn record() -> ClipRecord {
        let source = crate::store::SourceInfo {
            path: "a.mp4".into(),
            codec: "h264".into(),
            width: 2,
            height: 1,
            fps: 10.0,
            duration_s: 0.1,
            frames: 1,
            rotation: 0,
            matrix: "bt709".into(),
            range: "limited".into(),
            untagged: false,
        };
        ClipRecord {
            id: "a".into(),
            set: "s".into(),
            labelled: false,
            frames: 1,
            fps: 10.0,
            width: 2,
            height: 1,
            dropped: 0,
            repeated: 0,
            source,
            fingerprint: String::new(),
            key: String::new(),
            action_dims: Vec::new(),
            actions: None,
            sidecar: None,
            sidecar_fingerprint: None,
        }
    }

    fn names(dir: &std::path::Path) -> Vec<String> {
        let mut names: Vec<String> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        names.sort();
        names
    }

    #[test]
    fn commits_every_clip_and_reports_a_failure_with_its_file() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        // The record of clip 1 cannot be written: its folder is a file.
        std::fs::write(d.join("blocked"), b"").unwrap();
        let failures = std::sync::Mutex::new(Vec::new());
        let stop = AtomicBool::new(false);
        let ((), mut outcomes) = with_committer(
            &stop,
            &|i, reason| failures.lock().unwrap().push((i, reason.to_string())),
            |sender| {
                sender.send(pending(d, 0, d.join("0.json"))).unwrap();
                sender
                    .send(pending(d, 1, d.join("blocked").join("1.json")))
                    .unwrap();
            },
        );
        outcomes.sort_by_key(|(i, _)| *i);
        assert_eq!(outcomes[0], (0, Committed::Done));
        let Committed::Failed(reason) = &outcomes[1].1 else {
            panic!("{outcomes:?}")
        };
        assert!(reason.contains("blocked"), "{reason}");
        assert_eq!(failures.lock().unwrap()[0].0, 1);
        // Clip 0 is complete; clip 1's frames are in place but it has no
        // record, so it is not done and a rerun decodes it again.
        assert_eq!(
            names(d),
            ["0.frames", "0.json", "1.frames", "blocked"].map(String::from)
        );
        assert_eq!(
            crate::store::FrameReader::open(&d.join("0.frames"))
                .unwrap()
                .len(),
            1
        );
    }

    #[test]
    fn a_stopped_stage_writes_nothing_more_under_a_final_name() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        let stop = AtomicBool::new(true);
        let ((), outcomes) = with_committer(&stop, &|_, _| {}, |sender| {
            sender.send(pending(d, 0, d.join("0.json"))).unwrap();
        });
        assert_eq!(outcomes, vec![(0, Committed::Cancelled)]);
        assert!(names(d).is_empty(), "{:?}", names(d));
    }
}
