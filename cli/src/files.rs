//! Writing files without losing anything: complete-or-nothing writes through a temporary beside the target,
//! device nodes and pipes written in place (never replaced), outputs that would overwrite an input refused
//! before anything is written, and temporaries removed on Ctrl-C (and, when a run was killed, by the next run).

use std::fs::OpenOptions;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Mutex;

/// Temporaries of this process, removed by the Ctrl-C handler.
static TEMPORARIES: Mutex<Vec<PathBuf>> = Mutex::new(Vec::new());

/// Install the Ctrl-C (SIGINT/SIGTERM) handler once: it removes this process's temporaries, then exits with the
/// shell's code for an interrupt (130).
pub fn install_interrupt_handler() {
    let _ = ctrlc::set_handler(|| {
        if let Ok(list) = TEMPORARIES.lock() {
            for p in list.iter() {
                remove(p);
            }
        }
        eprintln!("breakdown: interrupted; nothing was written");
        std::process::exit(130);
    });
}

fn remove(p: &Path) {
    if p.is_dir() {
        let _ = std::fs::remove_dir_all(p);
    } else {
        let _ = std::fs::remove_file(p);
    }
}

/// A temporary file or folder, registered for the interrupt handler and removed on drop unless kept.
pub struct Temporary {
    pub path: PathBuf,
    keep: bool,
}

impl Temporary {
    pub fn new(path: PathBuf) -> Temporary {
        if let Ok(mut list) = TEMPORARIES.lock() {
            list.push(path.clone());
        }
        Temporary { path, keep: false }
    }

    /// The temporary has been moved into place: nothing to remove.
    pub fn keep(&mut self) {
        self.keep = true;
        if let Ok(mut list) = TEMPORARIES.lock() {
            list.retain(|p| p != &self.path);
        }
    }
}

impl Drop for Temporary {
    fn drop(&mut self) {
        if !self.keep {
            remove(&self.path);
            self.keep();
        }
    }
}

/// Tag of this process's temporaries: `.NAME.partial-PID`.
pub const PARTIAL_TAG: &str = "partial";

/// `.NAME.TAG-PID` beside `target`.
pub fn sibling(target: &Path, tag: &str) -> PathBuf {
    let name = target
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "output".into());
    folder_of(target).join(format!(".{name}.{tag}-{}", std::process::id()))
}

/// The folder `path` sits in ("." for a bare name).
pub fn folder_of(path: &Path) -> PathBuf {
    match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    }
}

/// Whether process `pid` still runs (Linux and other systems with /proc); `true` when it cannot be told, so
/// nothing of a live run is ever removed.
fn alive(pid: u32) -> bool {
    if !Path::new("/proc/self").exists() {
        return true;
    }
    Path::new("/proc").join(pid.to_string()).exists()
}

/// Remove `.NAME.partial-PID` and `.NAME.old-PID` leftovers of `target` whose process no longer runs (a run
/// killed before it could clean up).
pub fn remove_stale(target: &Path) {
    let Some(name) = target.file_name().map(|n| n.to_string_lossy().into_owned()) else {
        return;
    };
    let Ok(entries) = std::fs::read_dir(folder_of(target)) else {
        return;
    };
    for entry in entries.flatten() {
        let file = entry.file_name().to_string_lossy().into_owned();
        let Some(rest) = file.strip_prefix(&format!(".{name}.")) else {
            continue;
        };
        let pid = rest
            .strip_prefix(&format!("{PARTIAL_TAG}-"))
            .or_else(|| rest.strip_prefix("old-"))
            .and_then(|p| p.parse::<u32>().ok());
        if let Some(pid) = pid {
            if pid != std::process::id() && !alive(pid) {
                remove(&entry.path());
            }
        }
    }
}

/// The paths are the same file (or folder), by their canonical forms (symbolic links and `..` resolved).
pub fn same_path(a: &Path, b: &Path) -> bool {
    match (a.canonicalize(), b.canonicalize()) {
        (Ok(a), Ok(b)) => a == b,
        _ => false,
    }
}

/// `inner` lies inside (or is) `folder`, by canonical forms.
pub fn inside(inner: &Path, folder: &Path) -> bool {
    match (inner.canonicalize(), folder.canonicalize()) {
        (Ok(i), Ok(f)) => i.starts_with(f),
        _ => false,
    }
}

/// Refuse an output that is one of the inputs: `inputs` are (what, path) pairs such as ("DI", di.wav).
pub fn refuse_overwriting_inputs(
    option: &str,
    output: &Path,
    inputs: &[(&str, &Path)],
) -> Result<(), String> {
    for (what, input) in inputs {
        if same_path(output, input) {
            return Err(format!(
                "{option} '{}' is the {what} file: Breakdown never writes over an input; choose another output name",
                output.display()
            ));
        }
    }
    Ok(())
}

/// The target exists and is not a regular file or a folder: a device node (/dev/null, /dev/full), a FIFO or a
/// socket. Such a target is written in place, never replaced.
pub fn is_special(path: &Path) -> bool {
    std::fs::metadata(path).is_ok_and(|m| !m.is_file() && !m.is_dir())
}

/// Check that `output` can be written before any work starts: not a folder, its folder exists.
pub fn check_writable(option: &str, output: &Path) -> Result<(), String> {
    let shown = output.display();
    if output.is_dir() {
        return Err(format!(
            "{option} '{shown}': it is a folder; give a file name"
        ));
    }
    if is_special(output) {
        return Ok(());
    }
    if output.file_name().is_none() {
        return Err(format!("{option} '{shown}': not a file name"));
    }
    let folder = folder_of(output);
    if !folder.is_dir() {
        return Err(format!(
            "{option} '{shown}': the folder '{}' does not exist",
            folder.display()
        ));
    }
    Ok(())
}

fn io_reason(e: &std::io::Error) -> String {
    match e.kind() {
        std::io::ErrorKind::NotFound => "No such file or folder".into(),
        std::io::ErrorKind::PermissionDenied => "permission denied".into(),
        _ => e.to_string(),
    }
}

/// Write `bytes` to `path` completely or not at all: a regular file goes through a temporary beside it,
/// renamed over it when complete (a symbolic link is followed, so the file it points to is replaced and the
/// link kept); a device node or FIFO is written in place.
pub fn write_atomic(
    path: &Path,
    write: impl FnOnce(&mut dyn Write) -> std::io::Result<()>,
) -> Result<(), String> {
    let shown = path.display();
    let fail = |e: std::io::Error| format!("cannot write '{shown}': {}", io_reason(&e));
    if path.is_dir() {
        return Err(format!("cannot write '{shown}': it is a folder"));
    }
    if is_special(path) {
        let mut file = OpenOptions::new().write(true).open(path).map_err(fail)?;
        let mut buffered = std::io::BufWriter::new(&mut file);
        write(&mut buffered).map_err(fail)?;
        return buffered.flush().map_err(fail);
    }
    // Follow a symbolic link to the file it names.
    let target = match std::fs::symlink_metadata(path) {
        Ok(m) if m.file_type().is_symlink() => {
            path.canonicalize().unwrap_or_else(|_| path.to_path_buf())
        }
        _ => path.to_path_buf(),
    };
    let mut temp = Temporary::new(sibling(&target, PARTIAL_TAG));
    let result = (|| -> std::io::Result<()> {
        let file = std::fs::File::create(&temp.path)?;
        let mut buffered = std::io::BufWriter::new(file);
        write(&mut buffered)?;
        buffered.flush()?;
        Ok(())
    })();
    result.map_err(fail)?;
    std::fs::rename(&temp.path, &target).map_err(fail)?;
    temp.keep();
    Ok(())
}

/// A text file, complete or not at all.
pub fn write_text(path: &Path, text: &str) -> Result<(), String> {
    write_atomic(path, |w| w.write_all(text.as_bytes()))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn scratch(name: &str) -> PathBuf {
        let dir =
            std::env::temp_dir().join(format!("breakdown-files-{}-{name}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).unwrap();
        dir
    }

    #[test]
    fn device_node_is_written_in_place_not_replaced() {
        write_text(Path::new("/dev/null"), "hello").unwrap();
        assert!(is_special(Path::new("/dev/null")));
        let e = write_text(Path::new("/dev/full"), "hello").unwrap_err();
        assert!(e.contains("/dev/full"), "{e}");
        assert!(is_special(Path::new("/dev/full")));
    }

    #[test]
    fn symlink_is_kept_and_its_file_replaced() {
        let dir = scratch("link");
        let real = dir.join("real.txt");
        std::fs::write(&real, "old").unwrap();
        let link = dir.join("link.txt");
        std::os::unix::fs::symlink(&real, &link).unwrap();
        write_text(&link, "new").unwrap();
        assert!(std::fs::symlink_metadata(&link)
            .unwrap()
            .file_type()
            .is_symlink());
        assert_eq!(std::fs::read_to_string(&real).unwrap(), "new");
        let left: Vec<_> = std::fs::read_dir(&dir).unwrap().collect();
        assert_eq!(left.len(), 2);
        std::fs::remove_dir_all(dir).unwrap();
    }

    #[test]
    fn stale_temporaries_of_dead_processes_are_removed() {
        let dir = scratch("stale");
        let target = dir.join("out");
        // 4000000000 is above every system's largest process number (Linux allows at most 2^22); ours is alive.
        let dead = dir.join(".out.partial-4000000000");
        let live = dir.join(format!(".out.partial-{}", std::process::id()));
        let other = dir.join(".other.partial-4000000000");
        for p in [&dead, &live, &other] {
            std::fs::create_dir_all(p).unwrap();
        }
        remove_stale(&target);
        assert!(!dead.exists());
        assert!(live.exists() && other.exists());
        std::fs::remove_dir_all(dir).unwrap();
    }
}
