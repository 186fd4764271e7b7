//! The built binary in a real pseudo-terminal (portable-pty), its output fed
//! to a terminal emulator (vt100), for the tests that drive `ebb open` as a
//! person would and check what the terminal is left in.

use portable_pty::{CommandBuilder, NativePtySystem, PtySize, PtySystem};
use std::io::{Read, Write};
use std::path::Path;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// A program running in a pseudo-terminal, with the screen it drew.
pub struct Screen {
    /// The emulated terminal.
    pub parser: Arc<Mutex<vt100::Parser>>,
    /// Bytes typed at the program.
    pub keys: Box<dyn Write + Send>,
    /// The program.
    pub child: Box<dyn portable_pty::Child + Send + Sync>,
    /// Kept alive as long as the writer: dropping it would hang up the program.
    master: Box<dyn portable_pty::MasterPty + Send>,
}

impl Screen {
    /// Runs `ebb ARGS` in a `cols`×`rows` terminal, in the repository.
    pub fn open(rows: u16, cols: u16, args: &[&str]) -> Screen {
        Screen::open_in(rows, cols, args, Path::new(env!("CARGO_MANIFEST_DIR")))
    }

    /// Runs `ebb ARGS` in a `cols`×`rows` terminal, in directory `cwd`.
    pub fn open_in(rows: u16, cols: u16, args: &[&str], cwd: &Path) -> Screen {
        Screen::open_with(rows, cols, args, cwd, &[])
    }

    /// Runs `ebb ARGS` in a `cols`×`rows` terminal, in directory `cwd`,
    /// with the environment variables `env` set.
    pub fn open_with(
        rows: u16,
        cols: u16,
        args: &[&str],
        cwd: &Path,
        env: &[(&str, &str)],
    ) -> Screen {
        let pair = NativePtySystem::default()
            .openpty(PtySize {
                rows,
                cols,
                pixel_width: 0,
                pixel_height: 0,
            })
            .unwrap();
        let mut command = CommandBuilder::new(env!("CARGO_BIN_EXE_ebb"));
        command.args(args);
        command.cwd(cwd);
        command.env("TERM", "xterm-256color");
        command.env_remove("NO_COLOR");
        for (key, value) in env {
            command.env(key, value);
        }
        let child = pair.slave.spawn_command(command).unwrap();
        drop(pair.slave);
        let parser = Arc::new(Mutex::new(vt100::Parser::new(
            rows.try_into().unwrap(),
            cols.try_into().unwrap(),
            0,
        )));
        let (sink, mut reader) = (parser.clone(), pair.master.try_clone_reader().unwrap());
        std::thread::spawn(move || {
            let mut buf = [0u8; 8192];
            while let Ok(n) = reader.read(&mut buf) {
                if n == 0 {
                    break;
                }
                sink.lock().unwrap().process(&buf[..n]);
            }
        });
        let keys = pair.master.take_writer().unwrap();
        Screen {
            parser,
            keys,
            child,
            master: pair.master,
        }
    }

    /// Types `keys`, one at a time.
    pub fn send(&mut self, keys: &str) {
        // One key at a time, as a person types: an Esc followed at once by a
        // character would read as Alt+character.
        for key in keys.chars() {
            self.keys.write_all(key.to_string().as_bytes()).unwrap();
            self.keys.flush().unwrap();
            std::thread::sleep(Duration::from_millis(30));
        }
    }

    /// Waits until `needle` is on screen, and returns the screen.
    #[track_caller]
    pub fn wait_for(&self, needle: &str) -> String {
        let deadline = Instant::now() + Duration::from_secs(20);
        loop {
            let screen = self.parser.lock().unwrap().screen().contents();
            if screen.contains(needle) {
                return screen;
            }
            assert!(
                Instant::now() < deadline,
                "never saw {needle:?}; screen was:\n{screen}"
            );
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// The number shown after `label` once `needle` is on screen.
    #[track_caller]
    pub fn number_after(&self, needle: &str, label: &str) -> f64 {
        let screen = self.wait_for(needle);
        let line = screen
            .lines()
            .find(|line| line.contains(label))
            .unwrap_or_else(|| panic!("no {label:?} in\n{screen}"));
        let rest = line.split(label).nth(1).unwrap();
        rest.split_whitespace()
            .next()
            .and_then(|word| word.parse().ok())
            .unwrap_or_else(|| panic!("no number after {label:?} in {line}"))
    }

    /// Waits for the program to end.
    pub fn wait_exit(&mut self) -> portable_pty::ExitStatus {
        let deadline = Instant::now() + Duration::from_secs(20);
        loop {
            if let Some(status) = self.child.try_wait().unwrap() {
                // Let the reader thread drain the last bytes.
                std::thread::sleep(Duration::from_millis(200));
                return status;
            }
            assert!(Instant::now() < deadline, "ebb did not exit");
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    /// The program's process id.
    pub fn pid(&self) -> u32 {
        self.child.process_id().expect("a running child has a pid")
    }

    /// Sends `signal` (a name such as `TERM`) to the program by pid, as `kill` does.
    pub fn kill(&self, signal: &str) {
        let status = std::process::Command::new("kill")
            .args([&format!("-{signal}"), &self.pid().to_string()])
            .status()
            .expect("kill runs");
        assert!(status.success(), "kill -{signal} failed");
    }

    /// The terminal's modes now: (echo, canonical input, signals from keys).
    pub fn modes(&self) -> (bool, bool, bool) {
        let modes: libc::termios = self
            .master
            .get_termios()
            .expect("a unix pty has modes")
            .into();
        let on = |flag: libc::tcflag_t| modes.c_lflag & flag != 0;
        (on(libc::ECHO), on(libc::ICANON), on(libc::ISIG))
    }

    /// Whether the emulated terminal shows the alternate screen and hides the cursor.
    pub fn screen_state(&self) -> (bool, bool) {
        let parser = self.parser.lock().unwrap();
        (
            parser.screen().alternate_screen(),
            parser.screen().hide_cursor(),
        )
    }
}
