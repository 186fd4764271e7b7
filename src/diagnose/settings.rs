//! The rules' thresholds and the replay's options: defaults in code, an
//! optional RON settings file over them, then `--set NAME=VALUE` over that.
//!
//! The defaults are Ebb's own choices (orders of magnitude at which a
//! practitioner would look twice), not values from a standard.

use crate::dtype::{Dtype, Subnormals};
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// Why settings could not be read.
#[derive(Debug, thiserror::Error)]
pub enum SettingsError {
    /// The file could not be read.
    #[error("{}: cannot read the settings: {error} (hint: check the path given to --rules)", path.display())]
    Io {
        /// The file.
        path: PathBuf,
        /// The I/O error (in the message, not as a source, so it is printed once).
        error: std::io::Error,
    },
    /// The file is not a RON settings struct.
    #[error("{}:{line}:{column}: {message} (hint: a settings file is a RON struct such as `(gain_above: 50.0)`; names: {})", path.display(), Settings::NAMES.join(", "))]
    Syntax {
        /// The file.
        path: PathBuf,
        /// 1-based line.
        line: usize,
        /// 1-based column.
        column: usize,
        /// What the parser said.
        message: String,
    },
    /// A `--set` option that names no setting or gives a value of the wrong type.
    #[error("--set {text}: {message} (hint: {hint})")]
    Set {
        /// The option's text.
        text: String,
        /// What is wrong.
        message: String,
        /// What to do.
        hint: String,
    },
    /// A value out of its range.
    #[error(
        "{place}: {name} = {value}: {message} (hint: change {name} in the settings or with --set)"
    )]
    Range {
        /// The file, or `--set`.
        place: String,
        /// The setting.
        name: &'static str,
        /// Its value as text.
        value: String,
        /// Which range it must be in.
        message: String,
    },
}

/// Declares the settings once: the struct, its defaults, the list of names
/// and the per-name setter all come from this one table.
macro_rules! settings {
    ($( $(#[doc = $doc:literal])* $name:ident : $ty:ty = $default:expr, )*) => {
        /// Thresholds of the flag rules and options of the precision replay.
        #[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
        #[serde(default, deny_unknown_fields)]
        pub struct Settings {
            $( $(#[doc = $doc])* pub $name: $ty, )*
        }

        impl Default for Settings {
            fn default() -> Settings {
                Settings { $( $name: $default, )* }
            }
        }

        impl Settings {
    /// The trace as these settings sweep it: itself, or a copy flushing
    /// subnormal results when `subnormals` says so.
    pub fn swept_trace<'t>(&self, trace: &'t crate::trace::Trace) -> std::borrow::Cow<'t, crate::trace::Trace> {
        match self.subnormals {
            Subnormals::Flush => std::borrow::Cow::Owned(trace.retyped(trace.dtype(), Subnormals::Flush)),
            Subnormals::Keep => std::borrow::Cow::Borrowed(trace),
        }
    }

            /// Every setting's name, as written in a settings file and after `--set`.
            pub const NAMES: &'static [&'static str] = &[$( stringify!($name) ),*];

            /// Parses `value` as RON into the setting `name`; `Ok(false)` for an unknown name.
            fn set_field(&mut self, name: &str, value: &str) -> Result<bool, ron::error::SpannedError> {
                match name {
                    $( stringify!($name) => {
                        self.$name = ron::Options::default().from_str(value)?;
                        Ok(true)
                    } )*
                    _ => Ok(false),
                }
            }
        }
    };
}

settings! {
    /// Bytes of tensor contributions each sweep's ledger keeps; beyond them it
    /// keeps checkpoints every few steps and re-derives the rest on request.
    ledger_budget: usize = crate::sweep::DEFAULT_BUDGET,
    /// Warn when a finite magnitude exceeds the dtype's largest finite value divided by this factor.
    overflow_band: f64 = 16.0,
    /// A parameter gradient whose L2 norm is below this is vanishing.
    vanishing_below: f64 = 1e-7,
    /// A parameter gradient whose L2 norm is above this is exploding.
    exploding_above: f64 = 1e4,
    /// Vanishing when the gradient norm divided by the seed's norm is below this.
    vanishing_vs_seed: f64 = 1e-6,
    /// Exploding when the gradient norm divided by the seed's norm is above this.
    exploding_vs_seed: f64 = 1e4,
    /// Vanishing when the gradient norm divided by the median parameter gradient norm is below this.
    vanishing_vs_median: f64 = 1e-3,
    /// Exploding when the gradient norm divided by the median parameter gradient norm is above this.
    exploding_vs_median: f64 = 1e3,
    /// Flag a node whose contributions to non-leaf inputs, in norm, over its adjoint's norm are above this.
    gain_above: f64 = 100.0,
    /// Flag a node whose contributions to non-leaf inputs, in norm, over its adjoint's norm are below this.
    gain_below: f64 = 0.01,
    /// `keep` subnormal results (IEEE 754 gradual underflow) or `flush` them to zero, as some hardware does.
    subnormals: Subnormals = Subnormals::Keep,
    /// The dtypes the precision replay sweeps in; empty turns the replay off.
    replay: Vec<Dtype> = Dtype::ALL.to_vec(),
    /// A contribution counts as lost when at least this fraction of it is missing from the sum it was added to.
    lost_fraction: f64 = 0.5,
    /// The threshold of the gradient-clipping preview (global L2 norm).
    clip_norm: f64 = 1.0,
    /// Multiplies the forward consistency check's dtype-derived tolerance (traces/FORMAT.md, "Forward consistency").
    forward_slack: f64 = 1.0,
    /// A sigmoid or tanh unit is saturated where its derivative is below this fraction of its peak (1/4 for sigmoid, 1 for tanh).
    saturated_below: f64 = 0.01,
    /// Flag a sigmoid or tanh node when at least this fraction of its units is saturated.
    saturated_fraction: f64 = 0.1,
    /// Flag a ReLU node when at least this fraction of its units is 0 for every row of the batch.
    dead_fraction: f64 = 0.25,
    /// Flag activations whose RMS grows or shrinks by more than this factor from the group nearest the inputs.
    activation_growth: f64 = 1e3,
    /// Rules to turn off, by name: non_finite, overflow, near_overflow, underflow, vanishing, exploding, gain, forward_mismatch, saturated, dead_relu, activation_growth.
    off: Vec<super::rules::Rule> = Vec::new(),
}

impl Settings {
    /// Reads a settings file over the defaults.
    pub fn load(path: &Path) -> Result<Settings, SettingsError> {
        let text = std::fs::read_to_string(path).map_err(|error| SettingsError::Io {
            path: path.to_path_buf(),
            error,
        })?;
        Settings::parse(&text, path)
    }

    /// Parses settings text over the defaults; `path` only labels errors.
    pub fn parse(text: &str, path: &Path) -> Result<Settings, SettingsError> {
        let settings: Settings =
            ron::Options::default()
                .from_str(text)
                .map_err(|error| SettingsError::Syntax {
                    path: path.to_path_buf(),
                    line: error.span.start.line,
                    column: error.span.start.col,
                    message: error.code.to_string(),
                })?;
        settings.check(&path.display().to_string())?;
        Ok(settings)
    }

    /// Applies one `NAME=VALUE` option, the value written as in a settings file.
    pub fn apply(&mut self, text: &str) -> Result<(), SettingsError> {
        let error = |message: String, hint: String| SettingsError::Set {
            text: text.to_string(),
            message,
            hint,
        };
        let Some((name, value)) = text.split_once('=') else {
            return Err(error(
                "expected NAME=VALUE".into(),
                format!(
                    "for example --set gain_above=50; names: {}",
                    Settings::NAMES.join(", ")
                ),
            ));
        };
        let name = name.trim();
        match self.set_field(name, value.trim()) {
            Ok(true) => self.check("--set"),
            Ok(false) => Err(error(
                format!("no setting is called `{name}`"),
                format!("names: {}", Settings::NAMES.join(", ")),
            )),
            Err(parse) => Err(error(
                format!("the value does not fit `{name}`: {}", parse.code),
                "write the value as in a settings file: 50.0, flush, [f16, f32]".into(),
            )),
        }
    }

    /// Checks that every threshold is in its range.
    fn check(&self, place: &str) -> Result<(), SettingsError> {
        let range = |name: &'static str, value: f64, message: &str| SettingsError::Range {
            place: place.to_string(),
            name,
            value: value.to_string(),
            message: message.to_string(),
        };
        if !(self.overflow_band >= 1.0 && self.overflow_band.is_finite()) {
            return Err(range(
                "overflow_band",
                self.overflow_band,
                "must be a finite factor of at least 1",
            ));
        }
        let positive = [
            ("vanishing_below", self.vanishing_below),
            ("exploding_above", self.exploding_above),
            ("vanishing_vs_seed", self.vanishing_vs_seed),
            ("exploding_vs_seed", self.exploding_vs_seed),
            ("vanishing_vs_median", self.vanishing_vs_median),
            ("exploding_vs_median", self.exploding_vs_median),
            ("gain_above", self.gain_above),
            ("gain_below", self.gain_below),
            ("clip_norm", self.clip_norm),
        ];
        if let Some((name, value)) = positive
            .into_iter()
            .find(|(_, value)| !(*value > 0.0 && value.is_finite()))
        {
            return Err(range(name, value, "must be a finite number above 0"));
        }
        for (name, value) in [
            ("saturated_below", self.saturated_below),
            ("saturated_fraction", self.saturated_fraction),
            ("dead_fraction", self.dead_fraction),
        ] {
            if !(value > 0.0 && value <= 1.0) {
                return Err(range(name, value, "must be in (0, 1]"));
            }
        }
        if !(self.forward_slack > 0.0 && self.forward_slack.is_finite()) {
            return Err(range(
                "forward_slack",
                self.forward_slack,
                "must be a finite number above 0",
            ));
        }
        if !(self.activation_growth > 1.0 && self.activation_growth.is_finite()) {
            return Err(range(
                "activation_growth",
                self.activation_growth,
                "must be a finite factor above 1",
            ));
        }
        if !(self.lost_fraction > 0.0 && self.lost_fraction <= 1.0) {
            return Err(range(
                "lost_fraction",
                self.lost_fraction,
                "must be in (0, 1]",
            ));
        }
        if self.gain_below >= self.gain_above {
            return Err(range(
                "gain_below",
                self.gain_below,
                "must be below gain_above",
            ));
        }
        Ok(())
    }

    /// Whether `rule` is on.
    pub fn is_on(&self, rule: super::rules::Rule) -> bool {
        !self.off.contains(&rule)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diagnose::rules::Rule;

    #[test]
    fn a_file_overrides_only_what_it_names() {
        let settings = Settings::parse(
            "(gain_above: 50.0, subnormals: flush, replay: [f16], off: [gain])",
            Path::new("r.ron"),
        )
        .unwrap();
        assert_eq!(settings.gain_above, 50.0);
        assert_eq!(settings.subnormals, Subnormals::Flush);
        assert_eq!(settings.replay, vec![Dtype::F16]);
        assert!(!settings.is_on(Rule::Gain));
        assert_eq!(
            settings.vanishing_below,
            Settings::default().vanishing_below
        );
    }

    #[test]
    fn syntax_errors_name_line_and_column() {
        let error = Settings::parse(
            "(\n  gain_above: 50.0,\n  gain_abvoe: 2.0,\n)",
            Path::new("rules.ron"),
        )
        .unwrap_err();
        let text = error.to_string();
        assert!(text.starts_with("rules.ron:3:"), "{text}");
        assert!(text.contains("gain_abvoe"), "{text}");
    }

    #[test]
    fn set_options_patch_one_field_and_check_ranges() {
        let mut settings = Settings::default();
        settings.apply("vanishing_below=1e-9").unwrap();
        settings.apply("replay=[bf16, f32]").unwrap();
        assert_eq!(settings.vanishing_below, 1e-9);
        assert_eq!(settings.replay, vec![Dtype::Bf16, Dtype::F32]);
        assert!(
            settings
                .apply("nonsense=1")
                .unwrap_err()
                .to_string()
                .contains("no setting is called `nonsense`")
        );
        assert!(
            settings
                .apply("gain_above=fast")
                .unwrap_err()
                .to_string()
                .contains("does not fit")
        );
        assert!(
            settings
                .apply("overflow_band=0.5")
                .unwrap_err()
                .to_string()
                .contains("at least 1")
        );
        assert!(settings.apply("gain_above").is_err());
    }
}
