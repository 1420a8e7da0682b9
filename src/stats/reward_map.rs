//! A reward map as it is saved and served: a fitted [`ContinuityMap`] tied to
//! the two bundles it was fitted between, so it is only ever applied to the
//! cosines of the bundle it was fitted for.
//!
//! File form (JSON):
//! `{"applies_to": {"id", "digest"}, "lands_on": {"id", "digest"}, "map": {...}}`.

use serde::{Deserialize, Serialize};

use super::continuity::ContinuityMap;

/// One end of a map: a bundle's id and digest.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MapBundle {
    pub id: String,
    pub digest: String,
}

/// A continuity map with the bundles it was fitted between.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct RewardMap {
    /// The bundle whose cosines the map takes (the retrained one, `to` of a drift).
    pub applies_to: MapBundle,
    /// The bundle whose scale it gives (the one a run started on, `from` of a drift).
    pub lands_on: MapBundle,
    pub map: ContinuityMap,
}

/// Why a saved map cannot be read.
#[derive(Debug, thiserror::Error)]
pub enum RewardMapError {
    #[error("this map names no bundles (it was saved by an older befit); refit it with `befit drift --from OLD --to NEW --probe FILE --save-map FILE` or `POST /v1/drift` with save_map")]
    NoDigests,
    #[error("not a reward map: {0}")]
    Shape(serde_json::Error),
}

impl RewardMap {
    /// Parses a map file's text; a bare map without bundles is refused with how to refit it.
    pub fn from_json(text: &str) -> Result<RewardMap, RewardMapError> {
        match serde_json::from_str::<RewardMap>(text) {
            Ok(map) => Ok(map),
            Err(e) if serde_json::from_str::<ContinuityMap>(text).is_ok() => {
                drop(e);
                Err(RewardMapError::NoDigests)
            }
            Err(e) => Err(RewardMapError::Shape(e)),
        }
    }
}

impl crate::scoring::Remap for RewardMap {
    fn apply(&self, cosine: f32) -> f32 {
        self.map.apply(cosine)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn old_maps_without_bundles_are_refused_with_a_way_out() {
        let bare = r#"{"kind": "affine", "a": 1.0, "b": 0.0}"#;
        let e = RewardMap::from_json(bare).unwrap_err();
        assert!(matches!(e, RewardMapError::NoDigests));
        assert!(e.to_string().contains("--save-map"), "{e}");
        let full = format!(
            r#"{{"applies_to": {{"id": "blocks@v2", "digest": "b"}}, "lands_on": {{"id": "blocks@v1", "digest": "a"}}, "map": {bare}}}"#
        );
        let map = RewardMap::from_json(&full).unwrap();
        assert_eq!(map.applies_to.id, "blocks@v2");
        assert!((crate::scoring::Remap::apply(&map, 0.5) - 0.5).abs() < 1e-7);
        assert!(matches!(
            RewardMap::from_json("[1]").unwrap_err(),
            RewardMapError::Shape(_)
        ));
    }
}
