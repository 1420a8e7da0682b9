//! Holds `bundle.toml` against what the ONNX graphs really declare, so a
//! mismatch fails at start with the file and field, not at the first request.

use std::path::Path;

use ort::session::Session;
use ort::value::TensorElementType;

use super::{BundleError, FluencySpec, ImageSpec, TextSpec};

/// What one graph input or output must look like; `None` dims are free.
struct Expected<'a> {
    field: &'a str,
    name: &'a str,
    ty: TensorElementType,
    dims: Vec<Option<i64>>,
    /// Axes that must be dynamic (batch, tokens).
    dynamic: &'a [usize],
}

fn check(
    manifest: &Path,
    graph: &Path,
    outlets: &[ort::value::Outlet],
    kind: &str,
    want: Expected,
) -> Result<(), BundleError> {
    let fail = |message: String| BundleError::Field {
        path: manifest.to_path_buf(),
        field: want.field.to_string(),
        message: format!("{message} (in {})", graph.display()),
    };
    let Some(outlet) = outlets.iter().find(|o| o.name() == want.name) else {
        let names: Vec<&str> = outlets.iter().map(|o| o.name()).collect();
        return Err(fail(format!(
            "the graph has no {kind} named {:?}; its {kind}s are {names:?}",
            want.name
        )));
    };
    let dtype = outlet.dtype();
    let (Some(ty), Some(shape)) = (dtype.tensor_type(), dtype.tensor_shape()) else {
        return Err(fail(format!("{kind} {:?} is not a tensor", want.name)));
    };
    if ty != want.ty {
        return Err(fail(format!(
            "{kind} {:?} has element type {ty:?}, expected {:?}",
            want.name, want.ty
        )));
    }
    let dims: &[i64] = shape;
    if dims.len() != want.dims.len() {
        return Err(fail(format!(
            "{kind} {:?} has rank {} (shape {dims:?}), expected rank {}",
            want.name,
            dims.len(),
            want.dims.len()
        )));
    }
    for (axis, (have, expect)) in dims.iter().zip(&want.dims).enumerate() {
        if let Some(expect) = expect {
            if *have >= 0 && have != expect {
                return Err(fail(format!(
                    "{kind} {:?} has {have} at axis {axis} (shape {dims:?}), expected {expect}",
                    want.name
                )));
            }
        }
    }
    for &axis in want.dynamic {
        if dims[axis] >= 0 {
            return Err(fail(format!(
                "{kind} {:?} has a fixed size {} at axis {axis} (shape {dims:?}); export it with a dynamic axis",
                want.name, dims[axis]
            )));
        }
    }
    Ok(())
}

/// Checks the image graph: float32 `[batch, 3, size, size]` in, float32 `[batch, dimension]` out.
pub fn check_image_graph(
    manifest: &Path,
    graph: &Path,
    session: &Session,
    spec: &ImageSpec,
    dimension: usize,
) -> Result<(), BundleError> {
    let size = Some(i64::from(spec.size));
    check(
        manifest,
        graph,
        session.inputs(),
        "input",
        Expected {
            field: "image.input",
            name: &spec.input,
            ty: TensorElementType::Float32,
            dims: vec![None, Some(3), size, size],
            dynamic: &[0],
        },
    )?;
    check(
        manifest,
        graph,
        session.outputs(),
        "output",
        Expected {
            field: "image.output",
            name: &spec.output,
            ty: TensorElementType::Float32,
            dims: vec![None, Some(dimension as i64)],
            dynamic: &[],
        },
    )?;
    require_only_known_inputs(
        manifest,
        graph,
        session,
        &[spec.input.as_str()],
        "image.input",
    )
}

/// Checks the text graph: int64 `[batch, tokens]` ids (and mask) in, float32 `[batch, dimension]` out.
pub fn check_text_graph(
    manifest: &Path,
    graph: &Path,
    session: &Session,
    spec: &TextSpec,
    dimension: usize,
) -> Result<(), BundleError> {
    check_token_graph(
        manifest,
        graph,
        session,
        ("text.ids_input", &spec.ids_input),
        ("text.mask_input", spec.mask_input.as_deref()),
        Expected {
            field: "text.output",
            name: &spec.output,
            ty: TensorElementType::Float32,
            dims: vec![None, Some(dimension as i64)],
            dynamic: &[],
        },
    )
}

/// Checks the fluency head: int64 `[batch, tokens]` ids (and mask) in,
/// float32 `[batch]` probabilities out.
pub fn check_fluency_graph(
    manifest: &Path,
    graph: &Path,
    session: &Session,
    spec: &FluencySpec,
) -> Result<(), BundleError> {
    check_token_graph(
        manifest,
        graph,
        session,
        ("fluency.ids_input", &spec.ids_input),
        ("fluency.mask_input", spec.mask_input.as_deref()),
        Expected {
            field: "fluency.output",
            name: &spec.output,
            ty: TensorElementType::Float32,
            dims: vec![None],
            dynamic: &[],
        },
    )
}

/// A graph on token ids: `(field, name)` of the ids and of the optional mask,
/// each int64 `[batch, tokens]` with both axes dynamic; `output` as given; no
/// other input.
fn check_token_graph(
    manifest: &Path,
    graph: &Path,
    session: &Session,
    ids: (&str, &str),
    mask: (&str, Option<&str>),
    output: Expected,
) -> Result<(), BundleError> {
    let token_input = |field, name| Expected {
        field,
        name,
        ty: TensorElementType::Int64,
        dims: vec![None, None],
        dynamic: &[0, 1],
    };
    check(
        manifest,
        graph,
        session.inputs(),
        "input",
        token_input(ids.0, ids.1),
    )?;
    let mut known = vec![ids.1];
    if let Some(name) = mask.1 {
        check(
            manifest,
            graph,
            session.inputs(),
            "input",
            token_input(mask.0, name),
        )?;
        known.push(name);
    }
    check(manifest, graph, session.outputs(), "output", output)?;
    require_only_known_inputs(manifest, graph, session, &known, mask.0)
}

/// A graph input the manifest does not feed would make every run fail.
fn require_only_known_inputs(
    manifest: &Path,
    graph: &Path,
    session: &Session,
    known: &[&str],
    field: &str,
) -> Result<(), BundleError> {
    match session.inputs().iter().find(|i| !known.contains(&i.name())) {
        Some(extra) => Err(BundleError::Field {
            path: manifest.to_path_buf(),
            field: field.to_string(),
            message: format!(
                "the graph {} has an input {:?} that the manifest does not feed",
                graph.display(),
                extra.name()
            ),
        }),
        None => Ok(()),
    }
}
