//! Writing a file a person named without harming what is there: the new
//! content goes to a temporary file of a unique name beside it (never one
//! a person could have made, as `NAME.part` was), is put on the disk, and
//! only then takes the name. A failed write leaves the named file as it was
//! and nothing behind (the temporary file is removed when dropped).

use std::io::Write;
use std::path::Path;

/// New content for `path`, written but not yet under its name.
#[derive(Debug)]
pub struct Staged<'a> {
    tmp: tempfile::NamedTempFile,
    path: &'a Path,
}

/// Writes `bytes` beside `path` under a unique temporary name, on the disk;
/// [`Staged::commit`] gives it the name.
///
/// # Errors
/// I/O: creating, writing or syncing the temporary file (it is removed).
pub fn stage<'a>(path: &'a Path, bytes: &[u8]) -> std::io::Result<Staged<'a>> {
    stage_with(path, |f| f.write_all(bytes))
}

/// [`stage`] with the content written by `write`.
///
/// # Errors
/// I/O, or what `write` returns (the temporary file is removed).
pub fn stage_with<'a>(
    path: &'a Path,
    write: impl FnOnce(&mut std::fs::File) -> std::io::Result<()>,
) -> std::io::Result<Staged<'a>> {
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned());
    // The mode of the file it replaces, or for a new file what
    // `std::fs::write` gives (0666 less the umask): a temporary file is
    // created 0600, and product files and reports became readable by their
    // owner only (found by review).
    let existing = std::fs::metadata(path)
        .ok()
        .map(|m| std::os::unix::fs::PermissionsExt::mode(&m.permissions()) & 0o7777);
    let mode = existing.unwrap_or(0o666);
    let mut tmp = tempfile::Builder::new()
        .prefix(&format!(".{}.", name.as_deref().unwrap_or("fringe")))
        .suffix(".part")
        .permissions(std::os::unix::fs::PermissionsExt::from_mode(mode))
        .tempfile_in(dir)?;
    // (Creation applies the umask; a replaced file's own mode is kept as it was.)
    if existing.is_some() {
        tmp.as_file()
            .set_permissions(std::os::unix::fs::PermissionsExt::from_mode(mode))?;
    }
    write(tmp.as_file_mut())?;
    tmp.as_file().sync_all()?;
    Ok(Staged { tmp, path })
}

impl Staged<'_> {
    /// Renames the staged content over its path.
    ///
    /// # Errors
    /// I/O (the temporary file is removed).
    pub fn commit(self) -> std::io::Result<()> {
        self.tmp.persist(self.path).map(|_| ()).map_err(|e| e.error)
    }
}

/// [`stage`] and [`Staged::commit`].
///
/// # Errors
/// As those.
pub fn replace(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    stage(path, bytes)?.commit()
}

/// [`stage_with`] and [`Staged::commit`].
///
/// # Errors
/// As those.
pub fn replace_with(
    path: &Path,
    write: impl FnOnce(&mut std::fs::File) -> std::io::Result<()>,
) -> std::io::Result<()> {
    stage_with(path, write)?.commit()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A file named as the old temporary name (`NAME.part`) is never
    /// touched; the content arrives whole; a failed write leaves the old
    /// file and nothing else.
    #[test]
    fn replacing_touches_nothing_but_the_named_file() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("wheat.toml");
        let mine = d.path().join("wheat.toml.part");
        std::fs::write(&p, "old").unwrap();
        std::fs::write(&mine, "a person's own file").unwrap();
        replace_with(&p, |f| f.write_all(b"new")).unwrap();
        assert_eq!(std::fs::read_to_string(&p).unwrap(), "new");
        assert_eq!(
            std::fs::read_to_string(&mine).unwrap(),
            "a person's own file"
        );
        let failed = replace_with(&p, |f| {
            f.write_all(b"half")?;
            Err(std::io::Error::other("disk full"))
        });
        assert!(failed.is_err());
        assert_eq!(std::fs::read_to_string(&p).unwrap(), "new");
        let mut names: Vec<String> = std::fs::read_dir(d.path())
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        names.sort();
        assert_eq!(names, ["wheat.toml", "wheat.toml.part"]);
        // Staged and dropped: nothing behind.
        drop(stage(&p, b"never").unwrap());
        assert_eq!(std::fs::read_dir(d.path()).unwrap().count(), 2);
        assert_eq!(std::fs::read_to_string(&p).unwrap(), "new");
    }

    /// A file replaced keeps its mode; a new one gets what `fs::write`
    /// gives (0666 less the umask), not the temporary file's 0600.
    #[test]
    fn replacing_keeps_the_mode() {
        use std::os::unix::fs::PermissionsExt;
        let d = tempfile::tempdir().unwrap();
        let mode = |p: &Path| std::fs::metadata(p).unwrap().permissions().mode() & 0o777;
        let plain = d.path().join("plain");
        std::fs::write(&plain, "x").unwrap();
        let new = d.path().join("new");
        replace(&new, b"x").unwrap();
        assert_eq!(mode(&new), mode(&plain));
        let shared = d.path().join("shared");
        std::fs::write(&shared, "old").unwrap();
        std::fs::set_permissions(&shared, std::fs::Permissions::from_mode(0o664)).unwrap();
        replace(&shared, b"new").unwrap();
        assert_eq!(mode(&shared), 0o664);
    }
}
