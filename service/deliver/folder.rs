//! The mail folder: each email written as one RFC 5322 `.eml` file, for the
//! demo and for sites without a mail server (config `[email_folder]`).
//!
//! Role: the I/O shell of the folder channel. The bytes are exactly what
//! SMTP would carry (lettre's `Message::formatted()` of
//! [`crate::deliver::build_message`]), so any mail program that opens
//! `.eml` files shows the notice as a landholder would see it. The file is
//! named after the Message-ID, written to a hidden temporary file in the
//! same folder, flushed to disk, then renamed into place: a reader never
//! sees half a message, and writing the same email again replaces the file
//! instead of adding a second one.
//!
//! Errors: a message that cannot be built is permanent; a file-system error
//! (a full disk, a folder made read-only) is retriable, since it can clear.

use std::io::Write;
use std::path::{Path, PathBuf};

use crate::deliver::email::{build_message, OutgoingEmail};
use crate::deliver::DeliveryError;

/// Writes emails into one folder.
#[derive(Debug, Clone)]
pub struct FolderSender {
    dir: PathBuf,
}

impl FolderSender {
    /// A sender for `dir`, which is created (with its parents) on the first
    /// write if it does not exist.
    pub fn new(dir: impl Into<PathBuf>) -> Self {
        Self { dir: dir.into() }
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The path `email` is (or would be) written to.
    pub fn path_for(&self, email: &OutgoingEmail) -> PathBuf {
        self.dir.join(file_name(&email.message_id))
    }

    /// Writes `email` and returns the file's path. Blocking file work runs
    /// on tokio's blocking pool.
    pub async fn send(&self, email: &OutgoingEmail) -> Result<PathBuf, DeliveryError> {
        let bytes = build_message(email)?.formatted();
        let path = self.path_for(email);
        let dir = self.dir.clone();
        let target = path.clone();
        tokio::task::spawn_blocking(move || write_atomically(&dir, &target, &bytes))
            .await
            .map_err(|e| DeliveryError::retriable(format!("mail folder writer stopped: {e}")))?
            .map_err(|e| {
                DeliveryError::retriable(format!("cannot write {}: {e}", path.display()))
            })?;
        Ok(path)
    }
}

/// `<2b65...@kellerby.example>` -> `2b65...@kellerby.example.eml`: the
/// Message-ID without its angle brackets, every byte outside
/// `[A-Za-z0-9._@+=-]` replaced by `_` (so no `/`, no leading dot), at most
/// 200 bytes before the extension.
pub fn file_name(message_id: &str) -> String {
    let inner = message_id.trim_start_matches('<').trim_end_matches('>');
    let mut name: String = inner
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || matches!(c, '.' | '_' | '@' | '+' | '=' | '-') {
                c
            } else {
                '_'
            }
        })
        .take(200)
        .collect();
    if name.is_empty() || name.starts_with('.') {
        name.insert(0, '_');
    }
    name.push_str(".eml");
    name
}

fn write_atomically(dir: &Path, target: &Path, bytes: &[u8]) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)?;
    let file_name = target
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    // Hidden and not ending in .eml, so a folder watcher skips it; the
    // process id keeps two writers of the same message apart.
    let tmp = dir.join(format!(".{file_name}.{}.tmp", std::process::id()));
    let result = (|| {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        drop(f);
        std::fs::rename(&tmp, target)?;
        // The rename itself is durable once the folder is synced (common
        // practice on Linux file systems).
        if let Ok(d) = std::fs::File::open(dir) {
            let _ = d.sync_all();
        }
        Ok(())
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn file_names_are_safe() {
        assert_eq!(
            file_name("<2b65300baab149c9cfd5913a126e242d@kellerby.example>"),
            "2b65300baab149c9cfd5913a126e242d@kellerby.example.eml"
        );
        assert_eq!(file_name("<../../etc/passwd@x>"), "_.._.._etc_passwd@x.eml");
        assert_eq!(file_name("<.hidden@x>"), "_.hidden@x.eml");
        assert_eq!(file_name("<>"), "_.eml");
        assert!(file_name(&format!("<{}@x>", "a".repeat(500))).len() <= 204);
    }
}
