//! The run watch against sums and distinct counts computed here by hand.

use super::*;

fn sample(text: &str, reward: f32) -> SampleRecord {
    SampleRecord {
        text: text.to_string(),
        reward,
        cosine: reward / 2.0,
        flagged: None,
        in_bank: None,
    }
}

fn tag(run: &str, step: u64) -> RunTag {
    RunTag {
        run: run.to_string(),
        step,
        thresholds: None,
    }
}

#[test]
fn a_step_aggregates_across_requests_and_survives_reopening() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("runs.sqlite");
    let metrics = Arc::new(Registry::default());
    let watch = RunWatch::open(&path, Arc::clone(&metrics)).unwrap();
    watch
        .record(&tag("r1", 3), &[sample("a red cube", 1.0)])
        .unwrap();
    let (report, warnings) = watch
        .record(&tag("r1", 3), &[sample("a red ring", 3.0)])
        .unwrap();
    assert_eq!(report.step_samples, 2);
    assert!(warnings.is_empty(), "below min_samples: {warnings:?}");
    drop(watch);
    let watch = RunWatch::open(&path, metrics).unwrap();
    let (info, steps) = watch.series("r1", 0, 10).unwrap();
    assert_eq!((info.latest_step, info.steps, info.samples), (3, 1, 2));
    let s = &steps[0];
    // Rewards 1 and 3: mean 2, population std 1 (numpy's np.std default).
    assert_eq!((s.reward.mean, s.reward.std), (2.0, 1.0));
    // Li et al. 2016 distinct-n: words {a, red, cube, ring} of 6; bigrams 3 of 4.
    assert!((s.distinct_1 - 4.0 / 6.0).abs() < 1e-12);
    assert!((s.distinct_2 - 0.75).abs() < 1e-12);
    assert_eq!((s.vocabulary, s.mean_words, s.bank_equal), (4, 3.0, None));
}

#[test]
fn steps_may_lag_by_the_window_only() {
    let dir = tempfile::tempdir().unwrap();
    let watch = RunWatch::open(&dir.path().join("r.sqlite"), Arc::default()).unwrap();
    watch.record(&tag("r", 100), &[sample("x", 0.0)]).unwrap();
    watch
        .record(&tag("r", 100 - STEP_WINDOW), &[sample("y", 0.0)])
        .unwrap();
    let e = watch
        .record(&tag("r", 99 - STEP_WINDOW), &[sample("z", 0.0)])
        .unwrap_err();
    assert!(matches!(e, RunError::StepBack { latest: 100, .. }), "{e}");
    assert!(matches!(
        watch.series("nobody", 0, 1).unwrap_err(),
        RunError::UnknownRun(_)
    ));
    assert!(matches!(
        watch.series("r", 5, 1).unwrap_err(),
        RunError::Range { .. }
    ));
}

#[test]
fn repetition_warns_with_per_run_thresholds_and_gauges_stay_bounded() {
    let dir = tempfile::tempdir().unwrap();
    let metrics = Arc::new(Registry::default());
    let watch = RunWatch::open(&dir.path().join("r.sqlite"), Arc::clone(&metrics)).unwrap();
    let mut t = tag("loopy", 1);
    t.thresholds = Some(Thresholds {
        min_samples: 2,
        ..Thresholds::default()
    });
    // "cube cube cube": 2 of 3 words repeat (0.667 > 0.3); 1 of 2 bigrams (0.5 > 0.2);
    // distinct-2 over two copies: 1 distinct of 4 = 0.25 (not below 0.1).
    let (_, warnings) = watch
        .record(
            &t,
            &[sample("cube cube cube", 1.0), sample("cube cube cube", 1.0)],
        )
        .unwrap();
    let signals: Vec<&str> = warnings.iter().map(|w| w.signal).collect();
    assert_eq!(signals, ["repeated_words", "repeated_bigrams"]);
    // The thresholds (min_samples 2, not the default 16) stay with the run: a
    // later request without them still warns. "cube cube": 1 of 2 words
    // repeats (0.5 > 0.3); its one bigram repeats nothing.
    let (_, warnings) = watch
        .record(
            &tag("loopy", 2),
            &[sample("cube cube", 1.0), sample("cube cube", 1.0)],
        )
        .unwrap();
    let signals: Vec<&str> = warnings.iter().map(|w| w.signal).collect();
    assert_eq!(signals, ["repeated_words"]);
    assert_eq!(metrics.value("befit_run_step", &[("run", "loopy")]), 2.0);
    for i in 0..MAX_GAUGED_RUNS + 2 {
        watch
            .record(&tag(&format!("other{i}"), 1), &[sample("a b", 0.0)])
            .unwrap();
    }
    let exposed = metrics.render();
    let runs = exposed
        .lines()
        .filter(|l| l.starts_with("befit_run_step{"))
        .count();
    assert_eq!(runs, MAX_GAUGED_RUNS);
    assert!(!exposed.contains("run=\"loopy\""));
}

#[test]
fn recent_runs_are_the_latest_updated_with_their_last_steps() {
    let dir = tempfile::tempdir().unwrap();
    let watch = RunWatch::open(&dir.path().join("r.sqlite"), Arc::default()).unwrap();
    // Run "a": steps 0, 1, 2, 4 (3 skipped); then "b" and "c" updated later.
    for step in [0, 1, 2, 4] {
        watch
            .record(&tag("a", step), &[sample("a red cube", 1.0)])
            .unwrap();
        std::thread::sleep(std::time::Duration::from_millis(2));
    }
    for run in ["b", "c"] {
        watch
            .record(&tag(run, 0), &[sample("a red cube", 1.0)])
            .unwrap();
        std::thread::sleep(std::time::Duration::from_millis(2));
    }
    let names = |runs: &[RecentRun]| runs.iter().map(|r| r.run.name.clone()).collect::<Vec<_>>();
    assert_eq!(names(&watch.recent(2, 10).unwrap()), ["c", "b"]);
    // The last 3 step numbers of "a" are 2 ..= 4, of which 2 and 4 were sent.
    let all = watch.recent(10, 3).unwrap();
    assert_eq!(names(&all), ["c", "b", "a"]);
    let steps: Vec<u64> = all[2].series.iter().map(|s| s.step).collect();
    assert_eq!(steps, [2, 4]);
    assert!(
        all[2].warnings.is_empty(),
        "one sample a step is below min_samples"
    );
}
