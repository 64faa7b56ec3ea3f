//! The recruitment planner on constructed frames where the right pick is known, its
//! consistency with `gapwise fit`, its invariance to row order, and its messages for bad
//! requests.

mod common;
use common::*;

use serde_json::Value;

/// `gapwise plan FOLDER-OR-FILE OPTIONS...`.
fn plan_on(source: impl AsRef<std::path::Path>, options: &[&str]) -> Output {
    let source = source.as_ref().to_str().unwrap().to_string();
    let mut args = vec!["plan", source.as_str()];
    args.extend_from_slice(options);
    gapwise(&args)
}

/// The same with `--json` last, which must succeed: its JSON.
fn plan_on_json(source: impl AsRef<std::path::Path>, options: &[&str]) -> Value {
    let mut options = options.to_vec();
    options.push("--json");
    let out = plan_on(source, &options);
    assert_eq!(out.code, 0, "{}", out.stderr);
    serde_json::from_str(&out.stdout).unwrap()
}

/// The options naming a bare frame's id, flag and two covariates.
const BARE_COLUMNS: [&str; 6] = ["--id", "id", "--flag", "took_part", "--covariates", "x,y"];

/// `gapwise plan FILE` on a bare frame with its id, flag and two covariates named.
fn plan_bare(file: impl AsRef<std::path::Path>, options: &[&str]) -> Output {
    let mut all = BARE_COLUMNS.to_vec();
    all.extend_from_slice(options);
    plan_on(file, &all)
}

/// A universe with two clusters: A around (0, 0), well covered; B around (4, 4), with one
/// participant only. `certain` gives every country a chance of joining of 1.
fn clustered_frame() -> String {
    let mut rng = gapwise::stats::random::Rng::new(11);
    let mut out = String::from("id,x,y,took_part,chance,cost\n");
    for i in 0..24 {
        let took = i < 16;
        out.push_str(&format!(
            "A{i:02},{:.3},{:.3},{},1,{}\n",
            rng.normal(),
            rng.normal(),
            u8::from(took),
            10 + i % 3
        ));
    }
    for i in 0..8 {
        let took = i == 0;
        out.push_str(&format!(
            "B{i:02},{:.3},{:.3},{},1,{}\n",
            4.0 + rng.normal(),
            4.0 + rng.normal(),
            u8::from(took),
            10 + i % 3
        ));
    }
    out
}

fn plan_json(dir: &TempDir, file: &str, extra: &[&str]) -> Value {
    let mut options = vec!["--feasibility", "chance", "--json"];
    options.extend_from_slice(extra);
    if !extra.contains(&"--replicates") {
        options.extend_from_slice(&["--replicates", "20"]);
    }
    let out = plan_bare(dir.path().join(file), &options);
    assert_eq!(out.code, 0, "{}", out.stderr);
    serde_json::from_str(&out.stdout).unwrap()
}

#[test]
fn recruits_from_the_uncovered_cluster_first() {
    let dir = TempDir::new("cluster");
    dir.write("frame.csv", clustered_frame());
    let p = plan_json(&dir, "frame.csv", &["--budget", "3"]);
    let steps = p["steps"].as_array().unwrap();
    assert_eq!(steps.len(), 3);
    // Common sense: with one participant standing for a whole cluster, a second one from
    // that cluster spreads the weight most.
    assert!(
        steps[0]["id"].as_str().unwrap().starts_with('B'),
        "{}",
        steps[0]["id"]
    );
    assert!(steps[0]["expected_gain"].as_f64().unwrap() > 0.0);
    let mut previous = p["current"]["effective_n"].as_f64().unwrap();
    for s in steps {
        let now = s["expected_effective_n"].as_f64().unwrap();
        assert!((now - previous - s["expected_gain"].as_f64().unwrap()).abs() < 1e-9);
        previous = now;
        // Every chance is 1 here: the expectation is the set with everyone in.
        assert!((now - s["effective_n_if_all_join"].as_f64().unwrap()).abs() < 1e-9);
    }
    // Baselines have one entry per recruit.
    assert_eq!(
        p["baselines"]["likeliest"]["expected_effective_n"]
            .as_array()
            .unwrap()
            .len(),
        3
    );
    assert_eq!(
        p["baselines"]["random"]["expected_effective_n"]
            .as_array()
            .unwrap()
            .len(),
        3
    );
    // Stability is a share.
    for s in steps {
        let st = s["stability"].as_f64().unwrap();
        assert!((0.0..=1.0).contains(&st));
    }
}

#[test]
fn a_candidate_that_makes_balance_feasible_comes_first() {
    let dir = TempDir::new("feasible");
    let mut frame = String::from("id,x,region,took_part,chance\n");
    let mut rng = gapwise::stats::random::Rng::new(5);
    for i in 0..30 {
        let region = ["north", "south", "east"][i % 3];
        // Nobody from the east takes part.
        let took = region != "east" && i % 2 == 0;
        frame.push_str(&format!(
            "U{i:02},{:.3},{region},{},0.5\n",
            rng.normal(),
            u8::from(took)
        ));
    }
    dir.write("frame.csv", frame);
    let path = dir.path().join("frame.csv");
    let p = plan_on_json(
        &path,
        &[
            "--id",
            "id",
            "--flag",
            "took_part",
            "--covariates",
            "x",
            "--categorical",
            "region",
            "--feasibility",
            "chance",
            "--budget",
            "2",
            "--replicates",
            "0",
        ],
    );
    assert_eq!(p["current"]["feasible"], false);
    assert_eq!(p["current"]["effective_n"], 0.0);
    let first = &p["steps"][0];
    assert_eq!(first["feasible_if_all_join"], true);
    let id = first["id"].as_str().unwrap();
    let n: usize = id[1..].parse().unwrap();
    assert_eq!(n % 3, 2, "the first recruit {id} should come from the east");
}

#[test]
fn steps_equal_what_fit_reports_for_the_same_set() {
    let dir = TempDir::new("consistency");
    let frame = clustered_frame();
    dir.write("frame.csv", &frame);
    let p = plan_json(&dir, "frame.csv", &["--budget", "3"]);
    let mut recruited: Vec<String> = Vec::new();
    for (j, step) in p["steps"].as_array().unwrap().iter().enumerate() {
        recruited.push(step["id"].as_str().unwrap().to_string());
        let flipped: Vec<String> = frame
            .lines()
            .map(|l| {
                let cells: Vec<&str> = l.split(',').collect();
                if recruited.iter().any(|r| r == cells[0]) {
                    format!(
                        "{},{},{},1,{},{}",
                        cells[0], cells[1], cells[2], cells[4], cells[5]
                    )
                } else {
                    l.to_string()
                }
            })
            .collect();
        let name = format!("step{j}.csv");
        dir.write(&name, flipped.join("\n") + "\n");
        let path = dir.path().join(&name);
        let mut args = vec!["fit", path.to_str().unwrap()];
        args.extend_from_slice(&BARE_COLUMNS);
        args.extend_from_slice(&["--weighting", "entropy", "--json"]);
        let out = gapwise(&args);
        assert_eq!(out.code, 0, "{}", out.stderr);
        let fit: Value = serde_json::from_str(&out.stdout).unwrap();
        let ess = fit["weighting"]["effective_n"].as_f64().unwrap();
        assert!(
            (ess - step["effective_n_if_all_join"].as_f64().unwrap()).abs() < 1e-6,
            "step {j}: fit {ess} vs plan {}",
            step["effective_n_if_all_join"]
        );
        let max_smd = fit["balance"]
            .as_array()
            .unwrap()
            .iter()
            .map(|b| b["smd_before"].as_f64().unwrap().abs())
            .fold(0.0, f64::max);
        assert!((max_smd - step["max_abs_smd_if_all_join"].as_f64().unwrap()).abs() < 1e-9);
    }
}

#[test]
fn invariant_to_row_order() {
    let dir = TempDir::new("order");
    let frame = clustered_frame();
    let mut lines: Vec<&str> = frame.lines().collect();
    let header = lines.remove(0);
    lines.reverse();
    dir.write("frame.csv", &frame);
    dir.write("reversed.csv", format!("{header}\n{}\n", lines.join("\n")));
    let a = plan_json(&dir, "frame.csv", &["--budget", "4", "--replicates", "0"]);
    let b = plan_json(
        &dir,
        "reversed.csv",
        &["--budget", "4", "--replicates", "0"],
    );
    let key = |p: &Value| {
        p["steps"]
            .as_array()
            .unwrap()
            .iter()
            .map(|s| {
                (
                    s["id"].as_str().unwrap().to_string(),
                    (s["expected_effective_n"].as_f64().unwrap() * 1e6).round(),
                )
            })
            .collect::<Vec<_>>()
    };
    assert_eq!(key(&a), key(&b));
}

#[test]
fn cost_budget_is_respected() {
    let dir = TempDir::new("cost");
    dir.write("frame.csv", clustered_frame());
    let p = plan_json(
        &dir,
        "frame.csv",
        &["--cost-column", "cost", "--cost-budget", "25"],
    );
    let total = p["steps"].as_array().unwrap().last().unwrap()["cumulative_cost"]
        .as_f64()
        .unwrap();
    assert!((10.0..=25.0).contains(&total), "{total}");
}

#[test]
fn bad_requests_get_clear_messages() {
    let dir = TempDir::new("badplan");
    dir.write("frame.csv", clustered_frame());
    dir.write("everyone.csv", clustered_frame().replace(",0,1,", ",1,1,"));
    let path = dir.path().join("frame.csv");
    let p = path.to_str().unwrap();
    let everyone = dir.path().join("everyone.csv");
    let out = plan_bare(&everyone, &["--feasibility", "chance"]);
    assert_eq!(out.code, 1);
    assert!(out.stderr.contains("nobody to recruit"), "{}", out.stderr);
    let out = plan_bare(p, &["--budget", "50"]);
    assert!(
        out.stderr
            .contains("exceeds the 15 eligible countries that do not take part"),
        "{}",
        out.stderr
    );
    let out = plan_bare(p, &["--cost-column", "price", "--cost-budget", "20"]);
    assert_ne!(out.code, 0);
    assert!(out.stderr.contains("price"), "{}", out.stderr);
    let demo = demo_dir();
    let out = plan_on(
        &demo,
        &[
            "--cost-column",
            "price",
            "--cost-budget",
            "20",
            "--replicates",
            "0",
        ],
    );
    assert!(
        out.stderr.contains("unknown cost column 'price'"),
        "{}",
        out.stderr
    );
}

#[test]
fn plan_page_and_twin() {
    let addr = start_server(&demo_dir());
    let page = get(addr, "/plan?budget=3&replicates=10&joiner=XHW");
    assert_eq!(page.status, 200, "{}", page.body);
    assert!(page.body.contains("What if XHW joined"));
    assert!(page.body.matches("<svg").count() >= 2);
    let twin: Value = get_json(addr, "/api/plan?budget=3&replicates=10");
    assert_eq!(twin["steps"].as_array().unwrap().len(), 3);
    for item in ["paths.svg", "map.svg", "plan.csv", "candidates.csv"] {
        assert_eq!(
            get(addr, &format!("/plan/{item}?budget=3&replicates=0")).status,
            200,
            "{item}"
        );
    }
    assert_eq!(get(addr, "/plan?budget=0").status, 400);
}

/// Reads a committed fixture of tests/fixtures.
fn fixture(name: &str) -> String {
    std::fs::read_to_string(
        std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("tests/fixtures")
            .join(name),
    )
    .unwrap()
}

#[test]
fn expected_objective_equals_an_offline_enumeration() {
    // Source: tests/fixtures/planner_expectation.py (numpy + scipy, its own entropy
    // balancing), enumerating the 2^5 join outcomes of inviting the 5 candidates.
    let reference: Value = serde_json::from_str(&fixture("planner_expectation.json")).unwrap();
    let dir = TempDir::new("expectation");
    dir.write("frame.csv", fixture("planner_expectation.csv"));
    let p = plan_json(&dir, "frame.csv", &["--budget", "5", "--replicates", "0"]);
    assert_eq!(p["expectation"], "exact");
    let steps = p["steps"].as_array().unwrap();
    assert_eq!(steps.len(), 5);
    let last = &steps[4];
    let close = |ours: &Value, theirs: &Value, tol: f64| {
        let (a, b) = (ours.as_f64().unwrap(), theirs.as_f64().unwrap());
        assert!((a - b).abs() < tol, "{a} vs {b}");
    };
    close(
        &last["expected_effective_n"],
        &reference["expected_effective_n"],
        1e-6,
    );
    close(
        &last["expected_max_abs_smd"],
        &reference["expected_max_abs_smd"],
        1e-9,
    );
    close(
        &last["effective_n_if_all_join"],
        &reference["effective_n_if_all_join"],
        1e-6,
    );
    close(
        &p["current"]["effective_n"],
        &reference["effective_n_now"],
        1e-6,
    );
    assert!(last.get("expected_effective_n_mc_error").is_none());
}

#[test]
fn the_exact_optimum_equals_brute_force() {
    use gapwise::analysis::design;
    use gapwise::analysis::planner::evaluate::Evaluator;
    use gapwise::analysis::planner::{plan, Feasibility, PlanSettings};
    use gapwise::analysis::settings::Settings;
    #[path = "../benches/synthetic.rs"]
    mod synthetic;
    let view = synthetic::synthetic_universe(40, 3, 7);
    let settings = Settings::default();
    let ps = PlanSettings {
        budget: Some(3),
        feasibility: Feasibility::Model,
        replicates: 0,
        random_draws: 200,
        ..PlanSettings::default()
    };
    let p = plan(&view, &settings, &ps).unwrap();
    assert_eq!(p.optimality.method, "exact");
    // Brute force, independent of the planner's search and memo: every plan of 3, every
    // join outcome, each set evaluated afresh.
    let d = design::build(&view, &settings).unwrap();
    let eval = Evaluator::new(&d);
    let members: Vec<usize> = (0..d.n()).filter(|&i| d.participated[i]).collect();
    let chance = |i: usize| {
        p.candidates
            .iter()
            .find(|c| c.id == d.ids[i])
            .unwrap()
            .probability
    };
    let candidates: Vec<usize> = (0..d.n()).filter(|&i| !d.participated[i]).collect();
    assert_eq!(candidates.len(), p.candidates.len());
    let mut best = f64::NEG_INFINITY;
    for a in 0..candidates.len() {
        for b in a + 1..candidates.len() {
            for c in b + 1..candidates.len() {
                let trio = [candidates[a], candidates[b], candidates[c]];
                let mut value = 0.0;
                for mask in 0..8 {
                    let mut set = members.clone();
                    let mut w = 1.0;
                    for (bit, &u) in trio.iter().enumerate() {
                        if mask >> bit & 1 == 1 {
                            set.push(u);
                            w *= chance(u);
                        } else {
                            w *= 1.0 - chance(u);
                        }
                    }
                    value += w * eval.evaluate(&set, None).0.effective_n;
                }
                best = best.max(value);
            }
        }
    }
    assert!(
        (p.optimality.best_found - best).abs() < 1e-6,
        "{} vs {best}",
        p.optimality.best_found
    );
    // The plan cannot beat the optimum, and greedy plus exchange should come close.
    assert!(p.optimality.plan_value <= best + 1e-6);
    assert!(
        p.optimality.plan_value >= 0.97 * best,
        "{} vs {best}",
        p.optimality.plan_value
    );
}

#[test]
fn the_plan_beats_95_percent_of_random_plans_on_the_demo_and_real_indicators() {
    let demo = demo_dir();
    // Real indicators (Gapminder, tests/fixtures/real_frame) with invented participation.
    let real = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/real_frame");
    for (dir, source) in [
        (&demo, "auto"),
        (&demo, "model"),
        (&real, "auto"),
        (&real, "model"),
    ] {
        let p = plan_on_json(dir, &["--feasibility", source, "--replicates", "0"]);
        let o = &p["optimality"];
        assert!(o["random_plans"].as_u64().unwrap() >= 1000);
        let pct = o["plan_percentile_among_random"].as_f64().unwrap();
        assert!(pct >= 95.0, "{source}: {pct}");
        let plan_value = p["steps"].as_array().unwrap().last().unwrap()["expected_effective_n"]
            .as_f64()
            .unwrap();
        assert!((o["plan_value"].as_f64().unwrap() - plan_value).abs() < 1e-9);
        for rule in ["likeliest", "random", "most_different"] {
            let b = &p["baselines"][rule];
            assert!(
                b["expected_effective_n_mean"].as_f64().unwrap() <= plan_value + 1e-9,
                "{rule}"
            );
            assert!(b["draws"].as_u64().unwrap() >= 1);
        }
        assert!(p["baselines"]["random"]["mc_error"].as_f64().unwrap() > 0.0);
    }
}

#[test]
fn chances_and_costs_default_to_the_manifest() {
    let demo = demo_dir();
    // The demo names [recruitment] cost = "recruitment_cost" and feasibility =
    // "has_study_team".
    let p = plan_on_json(&demo, &["--cost-budget", "300", "--replicates", "0"]);
    assert_eq!(p["plan"]["cost_column"], "recruitment_cost");
    assert_eq!(p["chances"]["column"], "has_study_team");
    let steps = p["steps"].as_array().unwrap();
    assert!(!steps.is_empty());
    let total = steps.last().unwrap()["cumulative_cost"].as_f64().unwrap();
    assert!(total <= 300.0 + 1e-9, "{total}");
    // The model's chances are leave-one-out ones.
    let p = plan_on_json(&demo, &["--feasibility", "model", "--replicates", "0"]);
    assert_eq!(p["chances"]["source"], "model-leave-one-out");
    // Both budgets at once: one or the other.
    let out = plan_on(&demo, &["--budget", "3", "--cost-budget", "300"]);
    assert_ne!(out.code, 0);
}

/// The demo's frame as (code, wave) -> row of named cells.
fn demo_rows(
) -> std::collections::HashMap<(String, String), std::collections::HashMap<String, String>> {
    let text = std::fs::read_to_string(demo_dir().join("frame.csv")).unwrap();
    let mut lines = text.lines();
    let header: Vec<String> = lines.next().unwrap().split(',').map(String::from).collect();
    lines
        .map(|l| {
            let cells: std::collections::HashMap<String, String> = header
                .iter()
                .cloned()
                .zip(l.split(',').map(String::from))
                .collect();
            ((cells["code"].clone(), cells["wave"].clone()), cells)
        })
        .collect()
}

#[test]
fn support_choices_respect_the_budget() {
    // The demo prices support: [recruitment] support_cost and support_chance.
    let demo = demo_dir();
    let rows = demo_rows();
    for budget in ["150", "300", "600"] {
        let p = plan_on_json(&demo, &["--cost-budget", budget, "--replicates", "0"]);
        let wave = p["wave"].to_string();
        let steps = p["steps"].as_array().unwrap();
        assert!(!steps.is_empty());
        let mut total = 0.0;
        let mut seen = std::collections::HashSet::new();
        for s in steps {
            let id = s["id"].as_str().unwrap();
            assert!(seen.insert(id.to_string()), "{id} invited twice");
            let row = &rows[&(id.to_string(), wave.clone())];
            let base: f64 = row["recruitment_cost"].parse().unwrap();
            let cost = s["cost"].as_f64().unwrap();
            if s["supported"].as_bool().unwrap() {
                let extra: f64 = row["support_cost"].parse().unwrap();
                assert!((cost - base - extra).abs() < 1e-9, "{id}: {cost}");
                assert_eq!(s["support_cost"].as_f64(), Some(extra));
                let chance: f64 = row["chance_with_support"].parse().unwrap();
                assert!((s["probability"].as_f64().unwrap() - chance).abs() < 1e-12);
            } else {
                assert!((cost - base).abs() < 1e-9, "{id}: {cost}");
                assert!(s["support_cost"].is_null());
            }
            // Support is on offer for every candidate of the demo.
            assert!(s["support_gain_per_cost"].is_f64(), "{id}");
            total += cost;
        }
        let limit: f64 = budget.parse().unwrap();
        assert!(total <= limit + 1e-9, "{total} > {budget}");
        assert!((steps.last().unwrap()["cumulative_cost"].as_f64().unwrap() - total).abs() < 1e-9);
        if budget == "300" {
            // Countries without a study team cannot join plain (chance 0) but can with
            // support: with 300 to spend the plan buys some support.
            assert!(steps.iter().any(|s| s["supported"] == true), "{p}");
        }
    }
    // Invitations only when asked.
    let p = plan_on_json(
        &demo,
        &[
            "--cost-budget",
            "300",
            "--without-support",
            "--replicates",
            "0",
        ],
    );
    assert!(p["steps"]
        .as_array()
        .unwrap()
        .iter()
        .all(|s| s["supported"] == false));
    // A count budget never buys support (it costs money, not a place) and says so.
    let p = plan_on_json(&demo, &["--replicates", "0"]);
    assert!(p["steps"]
        .as_array()
        .unwrap()
        .iter()
        .all(|s| s["supported"] == false));
    assert!(p["notes"]
        .as_array()
        .unwrap()
        .iter()
        .any(|n| n.as_str().unwrap().contains("only under a cost budget")));
    // Costs show with a count budget too (the manifest's cost column).
    assert_eq!(p["plan"]["cost_column"], "recruitment_cost");
    assert!(p["steps"][0]["cost"].is_f64());
}

#[test]
fn support_from_a_bare_frame_goes_where_it_buys_most() {
    // Cluster B (far from the participants) cannot join plain but joins with support for
    // a small extra cost; A's candidates join plain. A budget of 30 buys at most two plain
    // invitations (cost 10-12) or one supported B (cost 10-12 + 5) and one plain A:
    // supported B recruits add far more balance (constructed so; common practice).
    let dir = TempDir::new("support");
    let mut csv = String::from("id,x,y,took_part,chance,cost,support_cost,chance_supported\n");
    for line in clustered_frame().lines().skip(1) {
        // id, x, y, took_part, chance, cost
        let mut cells: Vec<&str> = line.split(',').collect();
        let b = cells[0].starts_with('B');
        if b {
            cells[4] = "0";
        }
        csv.push_str(&cells.join(","));
        csv.push_str(if b { ",5,0.9\n" } else { ",5,1\n" });
    }
    dir.write("frame.csv", csv);
    let p = plan_json(
        &dir,
        "frame.csv",
        &[
            "--cost-column",
            "cost",
            "--cost-budget",
            "30",
            "--support-cost",
            "support_cost",
            "--support-chance",
            "chance_supported",
        ],
    );
    let steps = p["steps"].as_array().unwrap();
    assert!(
        steps
            .iter()
            .any(|s| s["supported"] == true && s["id"].as_str().unwrap().starts_with('B')),
        "{steps:?}"
    );
    let total: f64 = steps.iter().map(|s| s["cost"].as_f64().unwrap()).sum();
    assert!(total <= 30.0 + 1e-9, "{total}");
}

#[test]
fn history_chances_match_statsmodels() {
    use gapwise::analysis::design;
    use gapwise::analysis::planner::history::history_chances;
    use gapwise::analysis::settings::Settings;
    use gapwise::project::Project;
    // Reference: statsmodels Logit on the stacked earlier waves of the real-indicator
    // frame (tests/fixtures/make_history_fixture.py, history_reference.json).
    let reference: Value = serde_json::from_str(&fixture("history_reference.json")).unwrap();
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/real_frame");
    let project = Project::load(&dir).unwrap();
    let settings = Settings {
        wave: Some(2007),
        factors: Some(Vec::new()),
        ..Settings::default()
    };
    let view = gapwise::project::WaveView::new(&project, 2007).unwrap();
    let d = design::build(&view, &settings).unwrap();
    let h = history_chances(&project, &d, 2007, &settings).unwrap();
    assert_eq!(h.trained_on, vec![1997, 2002]);
    assert_eq!(
        h.n_training as u64,
        reference["n_training"].as_u64().unwrap()
    );
    let expected = reference["coef"].as_array().unwrap();
    assert_eq!(h.coef.len(), expected.len(), "{:?}", h.terms);
    for (c, e) in h.coef.iter().zip(expected) {
        assert!(
            (c.unwrap() - e.as_f64().unwrap()).abs() < 1e-6,
            "{c:?} vs {e}"
        );
    }
    let forecast = reference["forecast"].as_object().unwrap();
    let mut compared = 0;
    for (i, id) in d.ids.iter().enumerate() {
        if let Some(p) = forecast.get(id) {
            assert!(
                (h.probability[i] - p.as_f64().unwrap()).abs() < 1e-6,
                "{id}"
            );
            compared += 1;
        }
    }
    assert_eq!(compared, forecast.len());
    let check = h.check.as_ref().unwrap();
    assert_eq!(check.wave, 2002);
    assert_eq!(check.trained_on, vec![1997]);
    assert!((check.auc.unwrap() - reference["check_auc"].as_f64().unwrap()).abs() < 1e-9);
    assert_eq!(check.calibration.len(), 5);
    assert_eq!(
        check.calibration.iter().map(|b| b.n).sum::<usize>(),
        check.n
    );
}

#[test]
fn history_chances_on_the_page_and_their_limits() {
    let demo = demo_dir();
    let p = plan_on_json(&demo, &["--feasibility", "history", "--replicates", "5"]);
    assert_eq!(p["chances"]["source"], "history");
    assert_eq!(
        p["chances"]["history"]["trained_on"],
        serde_json::json!([2, 3])
    );
    assert_eq!(p["chances"]["history"]["check"]["wave"], 3);
    // Wave 2 has only wave 1 before it, which has no wave before it: nothing to learn from.
    let out = plan_on(&demo, &["--wave", "2", "--feasibility", "history"]);
    assert_ne!(out.code, 0);
    assert!(
        out.stderr.contains("at least two waves before wave 2"),
        "{}",
        out.stderr
    );
    // A bare frame has no history.
    let dir = TempDir::new("nohistory");
    dir.write("frame.csv", clustered_frame());
    let path = dir.path().join("frame.csv");
    let out = plan_bare(&path, &["--feasibility", "history"]);
    assert_ne!(out.code, 0);
    assert!(out.stderr.contains("project folder"), "{}", out.stderr);
    // The page shows the check's calibration table.
    let addr = start_server(&demo);
    let page = get(addr, "/plan?wave=4&feasibility=history&replicates=0");
    assert_eq!(page.status, 200, "{}", page.body);
    assert!(page.body.contains("Can the history forecast be believed?"));
    let table = page.body.split("Share that took part").nth(1).unwrap();
    let table = table.split("</table>").next().unwrap();
    assert_eq!(table.matches("<tr>").count(), 5, "one row per fifth");
}

#[test]
fn progress_stays_off_standard_error_when_piped() {
    // Common practice: progress is for people at a terminal; scripts get clean streams.
    let out = gapwise(&["plan", demo_dir().to_str().unwrap(), "--replicates", "5"]);
    assert_eq!(out.code, 0, "{}", out.stderr);
    assert!(out.stderr.is_empty(), "{:?}", out.stderr);
}

/// Whether a set of countries can be balanced must not depend on where the balancing dual
/// starts (common practice: the dual is convex, so a feasible set has one solution): a
/// start far from the solution, which can stall Newton's first steps, gives the verdict
/// and the effective number of the start from zero.
#[test]
fn a_far_warm_start_does_not_make_a_balanceable_set_infeasible() {
    use gapwise::analysis::{design, planner::evaluate::Evaluator, settings::Settings};
    let project = gapwise::project::Project::load(&demo_dir()).expect("demo loads");
    let mut checked = 0;
    for wave in 1..=4 {
        let view = project.wave(wave).expect("wave");
        let d = design::build(&view, &Settings::default()).expect("design");
        let eval = Evaluator::new(&d);
        let members: Vec<usize> = (0..d.n()).filter(|&i| d.participated[i]).collect();
        let (cold, dual) = eval.evaluate(&members, None);
        let Some(dual) = dual else { continue };
        assert!(cold.feasible);
        for scale in [-40.0, 25.0, 400.0] {
            let far = dual.mapv(|v| v + scale);
            let (warm, _) = eval.evaluate(&members, Some(&far));
            assert!(warm.feasible, "wave {wave}, start shifted by {scale}");
            let gap = (warm.effective_n - cold.effective_n).abs();
            assert!(
                gap < 1e-8 * cold.effective_n,
                "wave {wave}: {} vs {}",
                warm.effective_n,
                cold.effective_n
            );
            checked += 1;
        }
    }
    assert!(
        checked >= 3,
        "too few feasible waves ({checked}) to test anything"
    );
}
