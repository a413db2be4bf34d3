//! Label images of recorded frames, written after their rows commit.
//!
//! The workers keep each frame's labels as runs ([`LabelRuns`], compact and
//! cheap to make); whether the image is kept is known only once quality
//! control has judged the frame in the writer's transaction. After the commit
//! the writer hands the kept ones, with their frame ids, to the thread here,
//! which encodes each (LZW, the costly part: off the writer's thread, and
//! only for kept images) and writes it whole or not at all
//! ([`crate::encode::write_label_file`]) to [`label_image_path`]. An image
//! that cannot be written is logged with the frame's file and the cause; the
//! frame's row is already safe, and the service goes on.
//!
//! An image is written only after its row committed, so a crash can lose an
//! image (the row stays, without one) but never leave one for a row that is not
//! there. A frame done again after a crash gets its image then.

use std::path::{Path, PathBuf};
use std::thread::JoinHandle;

use crossbeam_channel::{Receiver, Sender};

use crate::encode::{write_label_file, LabelRuns, PARTIAL_SUFFIX};
use crate::store::{label_folder, label_image_path, LabelImages};
use crate::text::{shown, shown_path, Repeats};

/// Label images waiting to be written before the writer waits in turn: a
/// bound on the memory they hold (each held as runs, mostly far smaller than
/// its frame) and on the encoding left at shutdown (a 2048 × 2048 image
/// takes a few analysis times).
const WAITING: usize = 16;

/// One image to write.
struct Pending {
    frame_id: i64,
    /// The analyzed file, for the log.
    file: String,
    runs: LabelRuns,
}

/// The thread that writes label images, and which frames it keeps.
pub struct LabelImageWriter {
    keep: LabelImages,
    tx: Sender<Pending>,
    thread: JoinHandle<()>,
    /// Images that could not be queued, logged limited.
    repeats: Repeats,
}

impl LabelImageWriter {
    /// Starts the thread writing label images for the database `db`, or
    /// nothing for [`LabelImages::None`]. Removes what an interrupted write
    /// left (`*.partial`) in the folder.
    ///
    /// # Errors
    /// When the thread cannot start.
    pub fn start(db: &Path, keep: LabelImages) -> std::io::Result<Option<LabelImageWriter>> {
        if keep == LabelImages::None {
            return Ok(None);
        }
        let db = db.to_path_buf();
        let (tx, rx) = crossbeam_channel::bounded(WAITING);
        let thread = std::thread::Builder::new()
            .name("label-images".into())
            .spawn(move || write_loop(&db, &rx))?;
        Ok(Some(LabelImageWriter {
            keep,
            tx,
            thread,
            repeats: Repeats::default(),
        }))
    }

    /// Whether a frame's image is kept, given whether it got a flag.
    pub fn keeps(&self, flagged: bool) -> bool {
        match self.keep {
            LabelImages::None => false,
            LabelImages::Flagged => flagged,
            LabelImages::All => true,
        }
    }

    /// Queues the image of the committed frame `frame_id` (analyzed from
    /// `file`); waits while 16 images are queued.
    pub fn write(&self, frame_id: i64, file: &str, runs: LabelRuns) {
        let pending = Pending {
            frame_id,
            file: file.to_owned(),
            runs,
        };
        if self.tx.send(pending).is_err() {
            self.repeats.error(
                "label image thread stopped",
                format_args!(
                    "{}: the label image thread has stopped; no label image for frame {frame_id}",
                    shown(file)
                ),
            );
        }
    }

    /// Writes what is queued, then ends the thread.
    pub fn finish(self) {
        drop(self.tx);
        if self.thread.join().is_err() {
            tracing::error!("the label image thread panicked");
        }
    }
}

fn write_loop(db: &Path, rx: &Receiver<Pending>) {
    remove_partial_files(&label_folder(db));
    // A full volume fails every image: one line per kind and window.
    let repeats = Repeats::default();
    for p in rx {
        let path = label_image_path(db, p.frame_id);
        if let Err(cause) = encode_and_write(&path, &p.runs) {
            repeats.error(
                "label image not written",
                format_args!(
                    "{}: label image of frame {} not written ({}); the frame's row is recorded",
                    shown(&p.file),
                    p.frame_id,
                    shown(&cause)
                ),
            );
        }
    }
}

/// Encodes `runs` and writes them to `path`, making its folder first (on the
/// first image, and again if someone deleted it meanwhile). The error names
/// the file or folder and the cause.
fn encode_and_write(path: &Path, runs: &LabelRuns) -> Result<(), String> {
    let bytes = runs
        .encode()
        .map_err(|e| format!("{}: {e}", path.display()))?;
    let folder = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(folder)
        .map_err(|e| format!("cannot create the folder {}: {e}", folder.display()))?;
    write_label_file(path, &bytes).map_err(|e| e.to_string())
}

/// Removes the `.partial` files a crash left in `folder` (missing = nothing to do).
fn remove_partial_files(folder: &Path) {
    let Ok(entries) = std::fs::read_dir(folder) else {
        return;
    };
    let partial: Vec<PathBuf> = entries
        .filter_map(|e| e.ok().map(|e| e.path()))
        .filter(|p| p.to_string_lossy().ends_with(PARTIAL_SUFFIX))
        .collect();
    for p in partial {
        if let Err(e) = std::fs::remove_file(&p) {
            tracing::warn!("cannot remove {}: {e}", shown_path(&p));
        }
    }
}
