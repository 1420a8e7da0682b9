//! `bundle.toml`: what the server must know to run a bundle's encoders.

use std::path::Path;

use serde::{Deserialize, Serialize};

use super::BundleError;

/// The whole of `bundle.toml`.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Manifest {
    pub model: ModelSpec,
    pub image: ImageSpec,
    pub text: TextSpec,
    /// The optional fluency head (see [`FluencySpec`]).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub fluency: Option<FluencySpec>,
}

/// `[model]`: identity and the shared space's dimension.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct ModelSpec {
    pub name: String,
    pub version: String,
    pub dimension: usize,
    #[serde(default)]
    pub description: String,
}

/// How an image is brought to the encoder's square input.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize, utoipa::ToSchema)]
#[serde(rename_all = "kebab-case")]
pub enum ResizeRule {
    /// Resize to `size x size`, ignoring the aspect ratio.
    Stretch,
    /// Shorter side to `size` keeping the aspect ratio, then a centre crop.
    ShorterThenCrop,
}

/// Resampling filter, with the same kernels as Pillow's of the same names.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize, utoipa::ToSchema)]
#[serde(rename_all = "lowercase")]
pub enum Filter {
    Nearest,
    Bilinear,
    Bicubic,
    Lanczos3,
}

/// `[image]`: the image encoder and its preprocessing.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct ImageSpec {
    pub file: String,
    pub input: String,
    pub output: String,
    pub size: u32,
    pub resize: ResizeRule,
    pub filter: Filter,
    pub mean: [f32; 3],
    pub std: [f32; 3],
}

/// How a batch of token sequences is padded.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, Serialize, utoipa::ToSchema)]
#[serde(rename_all = "lowercase")]
pub enum Padding {
    /// To the longest sequence of the batch.
    Longest,
    /// Always to `max_tokens`.
    Fixed,
}

/// `[text]`: the text encoder and its tokenisation.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct TextSpec {
    pub file: String,
    #[serde(default = "default_tokenizer")]
    pub tokenizer: String,
    pub ids_input: String,
    #[serde(default)]
    pub mask_input: Option<String>,
    pub output: String,
    pub max_tokens: usize,
    #[serde(default)]
    pub pad_id: u32,
    #[serde(default = "default_padding")]
    pub padding: Padding,
    #[serde(default)]
    pub prefix: String,
}

/// `[fluency]`: an optional head giving the probability that a caption is
/// well-formed. It reads the token ids the text tower gets (the `[text]`
/// tokenizer, `max_tokens`, `pad_id` and `padding`), so it needs nothing from
/// the text tower's output and runs beside it.
#[derive(Debug, Clone, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct FluencySpec {
    pub file: String,
    /// int64 `[batch, tokens]`, padded as for the text tower.
    pub ids_input: String,
    /// Optional int64 `[batch, tokens]`, 1 on real tokens.
    #[serde(default)]
    pub mask_input: Option<String>,
    /// float32 `[batch]`: the probability, from 0 to 1.
    pub output: String,
}

fn default_tokenizer() -> String {
    "tokenizer.json".to_string()
}

fn default_padding() -> Padding {
    Padding::Longest
}

/// Largest image side a bundle may ask for; far above any real encoder, it
/// keeps a typo from making every request allocate gigabytes.
pub const MAX_IMAGE_SIZE: u32 = 4096;
/// Largest token limit a bundle may ask for, for the same reason.
pub const MAX_TOKENS_LIMIT: usize = 8192;

impl Manifest {
    /// Parses and checks the fields that need no other file.
    pub fn parse(text: &str, path: &Path) -> Result<Manifest, BundleError> {
        let manifest: Manifest = toml::from_str(text).map_err(|e| BundleError::Manifest {
            path: path.to_path_buf(),
            message: format!("not a valid bundle manifest: {}", e.to_string().trim_end()),
        })?;
        manifest.check(path)?;
        Ok(manifest)
    }

    fn check(&self, path: &Path) -> Result<(), BundleError> {
        let field = |field: &str, message: String| BundleError::Field {
            path: path.to_path_buf(),
            field: field.to_string(),
            message,
        };
        let name = &self.model.name;
        if name.is_empty()
            || !name
                .bytes()
                .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'-')
        {
            return Err(field(
                "model.name",
                format!("{name:?} must match [a-z0-9-]+"),
            ));
        }
        if self.model.version.is_empty() || self.model.version.contains(char::is_whitespace) {
            return Err(field(
                "model.version",
                "must be non-empty and without spaces".into(),
            ));
        }
        if self.model.dimension == 0 {
            return Err(field("model.dimension", "must be at least 1".into()));
        }
        if self.image.size == 0 || self.image.size > MAX_IMAGE_SIZE {
            return Err(field(
                "image.size",
                format!("must be between 1 and {MAX_IMAGE_SIZE}"),
            ));
        }
        if let Some(i) = self
            .image
            .std
            .iter()
            .position(|s| !(*s > 0.0 && s.is_finite()))
        {
            return Err(field("image.std", format!("entry {i} must be positive")));
        }
        if self.image.mean.iter().any(|m| !m.is_finite()) {
            return Err(field("image.mean", "entries must be finite numbers".into()));
        }
        if self.text.max_tokens == 0 || self.text.max_tokens > MAX_TOKENS_LIMIT {
            return Err(field(
                "text.max_tokens",
                format!("must be between 1 and {MAX_TOKENS_LIMIT}"),
            ));
        }
        if let Some(f) = &self.fluency {
            if f.ids_input.is_empty() || f.output.is_empty() {
                return Err(field(
                    "fluency",
                    "ids_input and output must name the graph's input and output".into(),
                ));
            }
        }
        Ok(())
    }

    /// Checks that every file the manifest names exists inside the bundle.
    pub fn check_files(&self, dir: &Path, path: &Path) -> Result<(), BundleError> {
        for (field, file) in self.files() {
            let relative = Path::new(file);
            let escapes = relative.is_absolute()
                || relative
                    .components()
                    .any(|c| matches!(c, std::path::Component::ParentDir));
            if escapes {
                return Err(BundleError::Field {
                    path: path.to_path_buf(),
                    field: field.to_string(),
                    message: format!("{file:?} must be a path inside the bundle folder"),
                });
            }
        }
        for (field, file) in self.files() {
            let relative = Path::new(file);
            if !dir.join(relative).is_file() {
                return Err(BundleError::Field {
                    path: path.to_path_buf(),
                    field: field.to_string(),
                    message: format!("file {} does not exist", dir.join(relative).display()),
                });
            }
        }
        Ok(())
    }

    /// The files the manifest names, with the field that names each, in
    /// digest order (the fluency head last, when there is one).
    pub fn files(&self) -> Vec<(&'static str, &str)> {
        let mut files = vec![
            ("image.file", self.image.file.as_str()),
            ("text.file", self.text.file.as_str()),
            ("text.tokenizer", self.text.tokenizer.as_str()),
        ];
        if let Some(f) = &self.fluency {
            files.push(("fluency.file", f.file.as_str()));
        }
        files
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
[model]
name = "blocks"
version = "v1"
dimension = 64

[image]
file = "image.onnx"
input = "pixels"
output = "embedding"
size = 64
resize = "stretch"
filter = "bilinear"
mean = [0.5, 0.5, 0.5]
std = [0.25, 0.25, 0.25]

[text]
file = "text.onnx"
ids_input = "input_ids"
mask_input = "attention_mask"
output = "embedding"
max_tokens = 32
"#;

    fn parse(text: &str) -> Result<Manifest, BundleError> {
        Manifest::parse(text, Path::new("b/bundle.toml"))
    }

    #[test]
    fn parses_a_good_manifest_with_defaults() {
        let m = parse(GOOD).unwrap();
        assert_eq!(m.model.dimension, 64);
        assert_eq!(m.image.resize, ResizeRule::Stretch);
        assert_eq!(m.text.padding, Padding::Longest);
        assert_eq!(m.text.tokenizer, "tokenizer.json");
        assert_eq!(m.text.mask_input.as_deref(), Some("attention_mask"));
        assert!(m.fluency.is_none());
        assert_eq!(m.files().len(), 3);
    }

    #[test]
    fn reads_a_fluency_section_and_digests_its_file_last() {
        let with = format!(
            "{GOOD}\n[fluency]\nfile = \"fluency.onnx\"\nids_input = \"input_ids\"\noutput = \"probability\"\n"
        );
        let m = parse(&with).unwrap();
        let f = m.fluency.as_ref().unwrap();
        assert_eq!(
            (f.ids_input.as_str(), f.mask_input.as_deref()),
            ("input_ids", None)
        );
        assert_eq!(m.files().last(), Some(&("fluency.file", "fluency.onnx")));
        let err = parse(&with.replace("output = \"probability\"", "output = \"\"")).unwrap_err();
        assert!(err.to_string().contains("`fluency`"), "{err}");
        let err = parse(&format!("{with}colour = 3\n")).unwrap_err();
        assert!(err.to_string().contains("colour"), "{err}");
        let err = parse(&with.replace("file = \"fluency.onnx\"", "file = \"../f.onnx\""))
            .unwrap()
            .check_files(Path::new("b"), Path::new("b/bundle.toml"))
            .unwrap_err();
        assert!(err.to_string().contains("`fluency.file`"), "{err}");
    }

    #[test]
    fn names_the_field_that_is_wrong() {
        let err = parse(&GOOD.replace("std = [0.25, 0.25, 0.25]", "std = [0.25, 0.0, 0.25]"))
            .unwrap_err();
        assert_eq!(
            err.to_string(),
            "b/bundle.toml: field `image.std`: entry 1 must be positive"
        );
        let err = parse(&GOOD.replace("name = \"blocks\"", "name = \"Blocks V1\"")).unwrap_err();
        assert!(err.to_string().contains("`model.name`"), "{err}");
        let err = parse(&GOOD.replace("max_tokens = 32", "max_tokens = 0")).unwrap_err();
        assert!(err.to_string().contains("`text.max_tokens`"), "{err}");
    }

    #[test]
    fn rejects_unknown_fields_and_bad_enums_with_the_toml_message() {
        let err = parse(&GOOD.replace("filter = \"bilinear\"", "filter = \"cubic\"")).unwrap_err();
        assert!(err.to_string().contains("cubic"), "{err}");
        let err = parse(&GOOD.replace("[text]", "[text]\ncolour = 3")).unwrap_err();
        assert!(err.to_string().contains("colour"), "{err}");
    }

    #[test]
    fn refuses_files_outside_the_bundle() {
        let m = parse(&GOOD.replace("file = \"text.onnx\"", "file = \"../text.onnx\"")).unwrap();
        let err = m
            .check_files(Path::new("b"), Path::new("b/bundle.toml"))
            .unwrap_err();
        assert!(err.to_string().contains("`text.file`"), "{err}");
    }
}
