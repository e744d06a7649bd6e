//! The page's workers share one mode search: a leading session searches, following sessions
//! take its modes (`Session::follow`), and records cross between them as flat number arrays
//! (`sample::encode_records`). Whatever the split of the chains, the run must be bit for bit the
//! run of one session that owns every chain (the invariant "identical numbers everywhere").

use kiln::run::{Overrides, Session};
use kiln::sample::{decode_records, encode_records};

fn spec(name: &str) -> kiln::Spec {
    let path = format!("{}/demo-targets/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap();
    kiln::parse_spec(&path, &text).unwrap()
}

fn overrides() -> Overrides {
    Overrides {
        seed: Some(5),
        chains: Some(4),
        draws: Some(150),
        warmup: Some(150),
        ..Overrides::default()
    }
}

/// Runs with the chains split over `workers` sessions as the page does (chain c goes to worker
/// c mod W), exchanging encoded records after every step; returns the leader's report as JSON.
fn split_run(name: &str, workers: usize) -> String {
    let s = spec(name);
    let o = overrides();
    let chains = 4;
    let owned = |w: usize| (w..chains).step_by(workers).collect::<Vec<usize>>();
    let mut sessions = vec![Session::new(&s, &o, Some(&owned(0))).unwrap()];
    let modes = sessions[0].modes_json().unwrap();
    for w in 1..workers {
        let f = Session::follow(&s, &o, &owned(w), &modes).unwrap();
        assert!(f.modes_json().is_none() && !f.leads());
        sessions.push(f);
    }
    while sessions[0].step().is_some() {
        let mut all = Vec::new();
        for x in sessions.iter_mut() {
            all.extend(encode_records(&x.run_step()));
        }
        for x in sessions.iter_mut() {
            x.absorb(decode_records(&all).unwrap()).unwrap();
        }
        for x in &sessions[1..] {
            assert_eq!(x.step_index(), sessions[0].step_index());
        }
    }
    assert!(sessions[1..].iter().all(|f| f.finish().is_err()));
    serde_json::to_string(&sessions[0].finish().unwrap().outcome).unwrap()
}

#[test]
fn one_two_and_four_workers_give_the_same_bits() {
    for name in ["default-two-modes.json", "search-area-three-scenarios.json"] {
        let whole =
            serde_json::to_string(&kiln::run::run(&spec(name), &overrides()).unwrap().outcome)
                .unwrap();
        for w in [1, 2, 4] {
            assert_eq!(split_run(name, w), whole, "{name} with {w} workers");
        }
    }
}

#[test]
fn a_follower_refuses_modes_that_do_not_fit() {
    let s = spec("default-two-modes.json");
    let o = overrides();
    assert!(Session::follow(&s, &o, &[1], "not json").is_err());
    assert!(Session::follow(&s, &o, &[1], "[]").is_err());
    let lead = Session::new(&s, &o, Some(&[0])).unwrap();
    let good = lead.modes_json().unwrap();
    assert!(Session::follow(&s, &o, &[1], &good).is_ok());
    // Modes with another number of unknowns than the model's are refused, not used.
    let mut modes: serde_json::Value = serde_json::from_str(&good).unwrap();
    for m in modes.as_array_mut().unwrap() {
        m["z"].as_array_mut().unwrap().push(serde_json::json!(0.5));
    }
    let err = Session::follow(&s, &o, &[1], &modes.to_string())
        .err()
        .unwrap();
    assert!(err.message.contains("do not fit"), "{}", err.message);
}
