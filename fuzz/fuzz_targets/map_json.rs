//! Reward map files: any text is refused, or gives a map that validates and
//! then maps every cosine in [-1, 1] to a finite reward (a 200 never carries
//! NaN or infinity); never a panic.
#![no_main]

use befit::stats::reward_map::RewardMap;
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let Ok(map) = RewardMap::from_json(text) else {
        return;
    };
    if map.map.validate().is_ok() {
        for i in 0..=200 {
            let x = -1.0 + i as f32 / 100.0;
            let y = map.map.apply(x);
            assert!(y.is_finite(), "map({x}) = {y}");
        }
    }
});
