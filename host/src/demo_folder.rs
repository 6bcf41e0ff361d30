//! The demo's output folder: the demo writes only into a folder it created
//! itself (marked by [`MARKER`], which lists what the demo wrote) or an
//! empty one, and deletes only what its marker lists. Anything else in the
//! folder makes it refuse, naming the folder and the foreign entry; nothing
//! is deleted then.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// The marker file a demo leaves in its folder.
pub const MARKER: &str = ".fringe-demo";

/// What the marker holds.
#[derive(Debug, Serialize, Deserialize)]
struct Marker {
    /// Always "fringe demo".
    written_by: String,
    /// Entries of the folder (top level) the demo wrote.
    entries: Vec<String>,
}

/// Why the folder cannot be used.
#[derive(Debug, thiserror::Error)]
pub enum FolderError {
    /// The path is a file.
    #[error("--out {0}: is a file, not a folder; choose a folder (nothing was changed)")]
    NotAFolder(PathBuf),
    /// The folder holds something a demo did not write.
    #[error("--out {dir}: the folder holds {entry:?}, which no demo wrote; the demo writes only into a new or empty folder or one a previous demo made, and deletes nothing of yours: choose another --out (nothing was changed)")]
    Foreign {
        /// The folder.
        dir: PathBuf,
        /// The first foreign entry.
        entry: String,
    },
    /// The marker is unreadable.
    #[error("--out {dir}: its {MARKER} file is not a demo marker ({why}); choose another --out (nothing was changed)")]
    BadMarker {
        /// The folder.
        dir: PathBuf,
        /// Why.
        why: String,
    },
    /// A file system error.
    #[error("--out {dir}: {source}")]
    Io {
        /// The folder.
        dir: PathBuf,
        /// The error.
        source: std::io::Error,
    },
}

fn io(dir: &Path) -> impl Fn(std::io::Error) -> FolderError + '_ {
    move |source| FolderError::Io {
        dir: dir.to_path_buf(),
        source,
    }
}

fn entries(dir: &Path) -> Result<Vec<String>, FolderError> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).map_err(io(dir))? {
        let e = e.map_err(io(dir))?;
        out.push(e.file_name().to_string_lossy().into_owned());
    }
    out.sort();
    Ok(out)
}

/// Makes `dir` ready for a demo: creates it, or checks it is empty, or
/// removes what a previous demo listed in its marker. Refuses (changing
/// nothing) when anything else is in it.
///
/// # Errors
/// [`FolderError`].
pub fn prepare(dir: &Path) -> Result<(), FolderError> {
    if !dir.exists() {
        std::fs::create_dir_all(dir).map_err(io(dir))?;
        return write_marker(dir, &[]);
    }
    if !dir.is_dir() {
        return Err(FolderError::NotAFolder(dir.to_path_buf()));
    }
    let present = entries(dir)?;
    if present.is_empty() {
        return write_marker(dir, &[]);
    }
    let marker_path = dir.join(MARKER);
    if !present.iter().any(|e| e == MARKER) {
        return Err(FolderError::Foreign {
            dir: dir.to_path_buf(),
            entry: present[0].clone(),
        });
    }
    let text = std::fs::read_to_string(&marker_path).map_err(io(dir))?;
    let marker: Marker = serde_json::from_str(&text).map_err(|e| FolderError::BadMarker {
        dir: dir.to_path_buf(),
        why: e.to_string(),
    })?;
    if marker.written_by != "fringe demo" {
        return Err(FolderError::BadMarker {
            dir: dir.to_path_buf(),
            why: format!("written_by is {:?}", marker.written_by),
        });
    }
    // Check everything first, delete after: a refusal changes nothing.
    if let Some(foreign) = present
        .iter()
        .find(|e| *e != MARKER && !marker.entries.contains(e))
    {
        return Err(FolderError::Foreign {
            dir: dir.to_path_buf(),
            entry: foreign.clone(),
        });
    }
    for e in present.iter().filter(|e| *e != MARKER) {
        let p = dir.join(e);
        if p.is_dir() {
            std::fs::remove_dir_all(&p).map_err(io(dir))?;
        } else {
            std::fs::remove_file(&p).map_err(io(dir))?;
        }
    }
    write_marker(dir, &[])
}

/// Records what the demo wrote into `dir` (every entry but the marker; the
/// folder was new, empty or cleared by [`prepare`], so all of it is the
/// demo's). Called when the demo ends, whether it succeeded or not.
///
/// # Errors
/// [`FolderError::Io`].
pub fn finish(dir: &Path) -> Result<(), FolderError> {
    let present: Vec<String> = entries(dir)?.into_iter().filter(|e| e != MARKER).collect();
    write_marker(dir, &present)
}

fn write_marker(dir: &Path, entries: &[String]) -> Result<(), FolderError> {
    let m = Marker {
        written_by: "fringe demo".into(),
        entries: entries.to_vec(),
    };
    let text = serde_json::to_string_pretty(&m).expect("a marker serialises");
    std::fs::write(dir.join(MARKER), text + "\n").map_err(io(dir))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn files(dir: &Path) -> Vec<String> {
        entries(dir).expect("list")
    }

    /// Regression: `demo --out DIR` deleted a folder holding a real
    /// database, notes and an audit bundle.
    #[test]
    fn a_folder_holding_a_real_database_is_refused_and_left_alone() {
        let t = tempfile::tempdir().expect("tmp");
        let d = t.path().join("plant");
        std::fs::create_dir(&d).expect("dir");
        std::fs::write(d.join("line2.db"), b"real data").expect("db");
        std::fs::write(d.join("manifest.json"), b"{}").expect("manifest");
        std::fs::write(d.join("notes.txt"), b"mine").expect("notes");
        let err = prepare(&d).expect_err("refused").to_string();
        assert!(err.contains(&d.display().to_string()), "{err}");
        assert!(
            err.contains("line2.db") && err.contains("nothing was changed"),
            "{err}"
        );
        assert_eq!(files(&d), ["line2.db", "manifest.json", "notes.txt"]);
        assert_eq!(std::fs::read(d.join("line2.db")).expect("db"), b"real data");
    }

    /// Regression: with another folder, a user's file was silently removed.
    #[test]
    fn a_users_file_in_a_demo_folder_stops_the_rerun_and_survives() {
        let t = tempfile::tempdir().expect("tmp");
        let d = t.path().join("demo");
        prepare(&d).expect("new folder");
        std::fs::write(d.join("line2.db"), b"demo").expect("db");
        std::fs::create_dir(d.join("report")).expect("report");
        finish(&d).expect("finish");
        std::fs::write(d.join("my-notes.txt"), b"mine").expect("user file");
        let err = prepare(&d).expect_err("refused").to_string();
        assert!(err.contains("my-notes.txt"), "{err}");
        assert_eq!(
            files(&d),
            [MARKER, "line2.db", "my-notes.txt", "report"],
            "nothing deleted"
        );
    }

    #[test]
    fn a_previous_demo_is_cleared_and_an_empty_folder_is_used() {
        let t = tempfile::tempdir().expect("tmp");
        let d = t.path().join("demo");
        prepare(&d).expect("new folder");
        std::fs::write(d.join("line2.db"), b"demo").expect("db");
        std::fs::create_dir(d.join("report")).expect("report");
        std::fs::write(d.join("report").join("index.html"), b"x").expect("page");
        finish(&d).expect("finish");
        prepare(&d).expect("rerun over its own folder");
        assert_eq!(files(&d), [MARKER]);
        let e = t.path().join("empty");
        std::fs::create_dir(&e).expect("empty");
        prepare(&e).expect("an empty folder is used");
        let f = t.path().join("file");
        std::fs::write(&f, b"x").expect("file");
        assert!(matches!(prepare(&f), Err(FolderError::NotAFolder(_))));
        std::fs::write(d.join(MARKER), b"not json").expect("bad marker");
        std::fs::write(d.join("x"), b"x").expect("x");
        assert!(matches!(prepare(&d), Err(FolderError::BadMarker { .. })));
        assert!(d.join("x").exists());
    }
}
