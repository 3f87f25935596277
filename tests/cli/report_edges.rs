//! The rough edges of the text screens (issue 15), one test each: the sweep's sentence is
//! complete, Markdown tables parse with the right column count in a CommonMark + tables parser
//! (pulldown-cmark; crosscheck's faults tables too), `inspect --format json` carries the
//! tool/schema envelope, estimators identical by construction share one row (JSON keeps them
//! apart), the tables have our own look, the gate says "holds"/"breaks", and the terminal
//! tables fit 100 columns unless `--wide`.

use crate::snapshots::output;
use crate::util::{crosscheck_args, demo, run, run_json};
use pulldown_cmark::{Event, Options, Parser, Tag, TagEnd};

const ROVER: &str = "demo-data/docking_rover.csv";

/// The tables of a Markdown text as CommonMark + GFM tables parses them: rows of cell texts,
/// the header row first.
fn markdown_tables(md: &str) -> Vec<Vec<Vec<String>>> {
    let mut tables = Vec::new();
    let (mut rows, mut row, mut cell): (Vec<Vec<String>>, Vec<String>, Option<String>) =
        (Vec::new(), Vec::new(), None);
    for event in Parser::new_ext(md, Options::ENABLE_TABLES) {
        match event {
            Event::Start(Tag::TableCell) => cell = Some(String::new()),
            Event::End(TagEnd::TableCell) => row.push(cell.take().unwrap_or_default()),
            Event::Text(t) | Event::Code(t) => {
                if let Some(c) = cell.as_mut() {
                    c.push_str(&t);
                }
            }
            Event::End(TagEnd::TableHead) | Event::End(TagEnd::TableRow) => {
                rows.push(std::mem::take(&mut row))
            }
            Event::End(TagEnd::Table) => tables.push(std::mem::take(&mut rows)),
            _ => {}
        }
    }
    tables
}

#[test]
fn markdown_tables_parse_with_every_column() {
    let rover = demo("docking_rover.csv");
    let args = ["audit", &rover, "--resamples", "300"];
    let md = run(&[&args[..], &["--format", "markdown"]].concat()).1;
    let csv = run(&[&args[..], &["--format", "csv"]].concat()).1;
    // The CSV has the table's columns plus bias_detected, bias_p, bias_p_adjusted,
    // bias_control, noise_scale, reference and notes.
    let columns = csv.lines().next().unwrap().split(',').count() - 7;
    let tables = markdown_tables(&md);
    assert_eq!(tables.len(), 1, "{md}");
    let t = &tables[0];
    for row in t {
        assert_eq!(row.len(), columns, "{row:?}");
    }
    // The escaped pipes are text of their header cells: `|g|` is one cell, not three.
    assert!(t[0].iter().any(|h| h == "|g|"), "{:?}", t[0]);
    assert!(t[0].iter().any(|h| h == "|g| low"), "{:?}", t[0]);
    // One row per estimator, td / gae:0 / nstep:1 joined (14 before minvar_total joined the
    // default set).
    assert_eq!(t.len() - 1, 15);
    assert!(t.iter().any(|r| r[0] == "gae:0 = nstep:1 = td"));

    let sweep = run(&[
        "sweep",
        &rover,
        "--over",
        "lambda",
        "--resamples",
        "300",
        "--format",
        "markdown",
    ])
    .1;
    let tables = markdown_tables(&sweep);
    assert_eq!(tables.len(), 1);
    assert_eq!(tables[0].len(), 22, "header and 21 grid points");
    assert!(tables[0].iter().all(|r| r.len() == tables[0][0].len()));

    let gate = run(&[
        "gate",
        &rover,
        "--resamples",
        "300",
        "--require",
        "rtg:snr>=1000",
        "--format",
        "markdown",
    ])
    .1;
    let tables = markdown_tables(&gate);
    assert_eq!(tables[0].len(), 2);
    assert!(tables[0].iter().all(|r| r.len() == 5), "{:?}", tables[0]);
    assert_eq!(tables[0][1][0], "breaks");

    // crosscheck: a faults table per differing column, 7 columns, a row per fault checked.
    let fault = demo("docking_rover_adv_fault.csv");
    let cc = run(&[&crosscheck_args(&fault)[..], &["--format", "markdown"]].concat()).1;
    let tables = markdown_tables(&cc);
    let sizes: Vec<usize> = tables.iter().map(|t| t.len() - 1).collect();
    assert_eq!(
        sizes,
        [11, 9],
        "advantage: the whole catalogue; return: no normalisation"
    );
    for t in &tables {
        assert!(t.iter().all(|r| r.len() == 7), "{t:?}");
        assert_eq!(t[1][..2], ["truncation_as_termination", "yes"]);
    }
}

#[test]
fn sweep_sentence_is_complete_in_table_markdown_and_json() {
    // On the rover demo every grid point lies within one standard error (README).
    let args = ["sweep", ROVER, "--over", "lambda", "--resamples", "300"];
    let json: serde_json::Value =
        serde_json::from_str(&output(&[&args[..], &["--format", "json"]].concat(), 0)).unwrap();
    assert_eq!(json["choice"]["band"].as_array().unwrap().len(), 21);
    let text = json["choice"]["text"].as_str().unwrap();
    let end = "this log cannot tell the settings apart, and more episodes would narrow the band";
    assert!(text.ends_with(end), "{text}");
    // The table wraps it at 100 columns; joined again, it ends the same way.
    let table = output(&args, 0);
    let choice = &table[table.find("choice: ").unwrap()..];
    let joined: Vec<&str> = choice.split_whitespace().collect();
    assert!(joined.join(" ").ends_with(end), "{choice}");
    let md = output(&[&args[..], &["--format", "markdown"]].concat(), 0);
    assert!(md.trim_end().ends_with(end), "{md}");
}

#[test]
fn inspect_json_has_the_tool_envelope() {
    let rover = demo("docking_rover.csv");
    let inspect = run_json(&["inspect", &rover, "--format", "json"]);
    let audit = run_json(&["audit", &rover, "--resamples", "50", "--format", "json"]);
    assert_eq!(inspect["tool"]["name"], "gradaudit");
    assert_eq!(inspect["tool"]["schema"], "gradaudit.inspect/1");
    assert_eq!(inspect["tool"]["version"], audit["tool"]["version"]);
    // The summary stays where it was.
    assert_eq!(inspect["episodes"], 150);
}

#[test]
fn identical_estimators_share_a_row_and_keep_their_json_entries() {
    let args = ["audit", ROVER, "--resamples", "300"];
    let table = output(&args, 0);
    // Whitespace joined, since the legend wraps at 100 columns and may break inside the name.
    let joined = table.split_whitespace().collect::<Vec<_>>().join(" ");
    assert_eq!(
        joined.matches("gae:0 = nstep:1 = td ").count(),
        3,
        "main and interval blocks, and the legend of uncertain biases"
    );
    // Rows start at the margin; a wrapped legend's continuation lines are indented.
    for line in table.lines().filter(|l| !l.starts_with(' ')) {
        let first = line.split_whitespace().next().unwrap_or("");
        assert!(
            !["td", "nstep:1"].contains(&first),
            "a separate row: {line}"
        );
    }
    let json: serde_json::Value =
        serde_json::from_str(&output(&[&args[..], &["--format", "json"]].concat(), 0)).unwrap();
    let names = crate::util::strings(&json["estimators"], "name");
    for n in ["td", "gae:0", "nstep:1"] {
        assert_eq!(names.iter().filter(|x| **x == n).count(), 1, "{n}");
    }
    // A log where they differ in nothing else: the legend names the row once, with its
    // adjusted p-value.
    let legend = &joined[joined
        .find("adjusted p:")
        .expect("a legend of unsure biases")..];
    assert_eq!(
        legend.matches("gae:0 = nstep:1 = td ").count(),
        1,
        "{legend}"
    );
    let after = &legend[legend.find("gae:0 = nstep:1 = td ").unwrap() + 21..];
    let p: f64 = after.split([',', ' ']).next().unwrap().parse().unwrap();
    assert!((0.0..=1.0).contains(&p), "{legend}");
}

#[test]
fn tables_have_our_own_look_and_fit_100_columns() {
    for args in [
        vec!["audit", ROVER, "--resamples", "300"],
        vec![
            "audit",
            "demo-data/parcel_diverter.csv",
            "--resamples",
            "300",
        ],
        vec!["sweep", ROVER, "--over", "lambda", "--resamples", "300"],
        vec!["sweep", ROVER, "--over", "nstep", "--resamples", "300"],
    ] {
        let out = output(&args, 0);
        let widest = out.lines().map(|l| l.chars().count()).max().unwrap();
        assert!(widest <= 100, "{args:?}: a line of {widest} columns\n{out}");
        // No box: no vertical bars or corners; a light rule under the header.
        assert!(!out.contains(['│', '┌', '└', '╞', '═']), "{out}");
        let rule = out.lines().find(|l| l.starts_with('─')).expect("a rule");
        assert!(rule.chars().all(|c| c == '─'));
    }
    // --wide puts the interval ends in the table itself, wider than 100 columns.
    let wide = output(&["audit", ROVER, "--resamples", "300", "--wide"], 0);
    let header = wide.lines().find(|l| l.starts_with("estimator")).unwrap();
    assert!(
        header.contains("|g| low") && header.contains("cos_half high"),
        "{header}"
    );
    assert!(header.chars().count() > 100);
    assert!(!wide.contains("intervals (bootstrap;"));
    let (code, _, err) = run(&["audit", ROVER, "--wide", "--format", "json"]);
    assert_eq!(code, 2, "{err}");
    assert!(err.contains("--wide applies to --format table"), "{err}");
}

#[test]
fn decimal_points_line_up_in_the_number_columns() {
    let out = output(&["audit", ROVER, "--resamples", "300"], 0);
    let lines: Vec<&str> = out.lines().collect();
    let h = lines
        .iter()
        .position(|l| l.starts_with("estimator"))
        .unwrap();
    // The variance column: its header's right edge; every cell's point (or end, for an
    // integer) at the same place in each row.
    let end = lines[h].find("variance").unwrap() + "variance".len();
    let rows: Vec<&str> = lines[h + 2..]
        .iter()
        .take_while(|l| !l.is_empty())
        .copied()
        .collect();
    // 14 before minvar_total joined the default set.
    assert_eq!(rows.len(), 15);
    let points: Vec<usize> = rows
        .iter()
        .map(|l| {
            let head = l[..end].trim_end();
            let cell_start = head.rfind("  ").unwrap() + 2;
            let cell = l[cell_start..].split_whitespace().next().unwrap();
            cell_start + cell.find('.').unwrap_or(cell.len())
        })
        .collect();
    assert!(points.iter().all(|p| *p == points[0]), "{points:?}\n{out}");
}

#[test]
fn gate_words_say_what_was_checked() {
    let rover = demo("docking_rover.csv");
    let (code, out, _) = run(&[
        "gate",
        &rover,
        "--resamples",
        "300",
        "--require",
        "gae:0.5:snr>=2",
        "--require",
        "rtg:snr>=1000",
    ]);
    assert_eq!(code, 1);
    assert!(out.contains("holds   gae:0.5 snr >= 2: measured"), "{out}");
    assert!(out.contains("breaks  rtg snr >= 1000: measured"), "{out}");
    assert!(out.contains("gate breaks: 1 of 2 checks break"), "{out}");
    for word in ["pass ", "FAIL", "FAILED", "passed"] {
        assert!(!out.contains(word), "{word}: {out}");
    }
}

/// The interval block names cosine_half's method: the episode jackknife when the audit holds
/// per-episode rows, the spread of the split cosines in a streamed (Poisson) audit, which has none.
#[test]
fn interval_header_names_the_cosine_method_of_each_resampling() {
    let multinomial = output(&["audit", ROVER, "--resamples", "300"], 0);
    assert!(
        multinomial.contains("cos_half: episode jackknife;"),
        "{multinomial}"
    );
    let poisson = output(
        &[
            "audit",
            ROVER,
            "--resamples",
            "300",
            "--resampling",
            "poisson",
        ],
        0,
    );
    assert!(
        poisson.contains("cos_half: spread of the split cosines;"),
        "{poisson}"
    );
}
