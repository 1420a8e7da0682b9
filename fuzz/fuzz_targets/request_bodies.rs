//! Every request body of the API, parsed as the server parses it (with the
//! failing field's path); rewards requests then go through the domain's
//! checks of groups, scale, baseline and guard. Never a panic.
#![no_main]

use befit::intake::limits::Limits;
use befit::scoring::{check_groups, Guard, RewardSpec};
use befit::server::json::parse_json;
use befit::server::routes::{bank, images, rewards, statistics, vectors};
use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    let Some((&which, body)) = data.split_first() else {
        return;
    };
    match which % 8 {
        0 => {
            let _ = parse_json::<vectors::VectorsRequest>(body);
        }
        1 => {
            let _ = parse_json::<bank::AppendRequest>(body);
        }
        2 => {
            let _ = parse_json::<bank::NeighborsRequest>(body);
        }
        3 => {
            let _ = parse_json::<statistics::CalibrationRequest>(body);
        }
        4 => {
            let _ = parse_json::<statistics::DriftRequest>(body);
        }
        5 => {
            let _ = parse_json::<images::RegisterRequest>(body);
        }
        _ => rewards_request(body),
    }
});

fn rewards_request(body: &[u8]) {
    let Ok(request) = parse_json::<rewards::RewardsRequest>(body) else {
        return;
    };
    let Ok(mut spec) = RewardSpec::new(request.scale, request.baseline, None) else {
        return;
    };
    if let Some(json) = request.guard {
        match Guard::new(json, None, None) {
            Ok(guard) => spec = spec.with_guard(guard),
            Err(_) => return,
        }
    }
    let groups: Result<Vec<_>, _> = request
        .groups
        .into_iter()
        .enumerate()
        .map(|(g, group)| group.into_group(&format!("groups[{g}]")))
        .collect();
    if let Ok(groups) = groups {
        let _ = check_groups(&groups, &spec, &Limits::default(), "groups");
    }
}
