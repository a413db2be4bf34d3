//! `framewarden report` on a generated plate run: 96 wells × 48 time points
//! recorded by the real watch service (the demo's replay, without pauses),
//! then the report written as the command writes it. Prints the report's size
//! and time against the budget (15 MB, 10 s) as ratios.
//!
//!     cargo bench --bench report                       # 96 wells x 48 time points, 256 px
//!     cargo bench --bench report -- --size 512

use std::time::Instant;

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let size: usize = args
        .iter()
        .position(|a| a == "--size")
        .and_then(|i| args.get(i + 1))
        .map_or(256, |s| s.parse().expect("--size N"));
    let wells: Vec<String> = ('A'..='H')
        .flat_map(|r| (1..=12).map(move |c| format!("\"{r}{c:02}\"")))
        .collect();
    // Four doses, 24 wells each; the lamp dims over the last third; one file
    // cut off. No pauses: the service records as fast as it can.
    let doses = ["vehicle", "0.3 uM", "3 uM", "30 uM"];
    let growth = [1.03, 1.02, 1.0, 0.97];
    let treatments: String = wells
        .chunks(24)
        .zip(doses.iter().zip(growth))
        .map(|(w, (dose, g))| {
            format!(
                "[[treatment]]\ndose = \"{dose}\"\nwells = [{}]\ngrowth_per_step = {g}\n",
                w.join(", ")
            )
        })
        .collect();
    let scenario = format!(
        "compound = \"FW-117\"\nchannel = \"nuclei\"\ntime_points = 48\ninterval_ms = 0\n\
         size_px = {size}\nbit_depth = 16\nstart_objects = 18\nobject_level = 0.45\n\
         object_level_spread = 0.3\nchunks = 1\nchunk_pause_ms = 0\ntemp_name_every = 0\n\
         temp_suffix = \".part\"\ncorrupt = {{ well = \"B03\", time_point = 6 }}\n\
         {treatments}[lamp]\nfrom = 32\nend = 0.55\n"
    );
    let scenario = framewarden::demo::Scenario::parse(&scenario).expect("the scenario");
    let dir = tempfile::tempdir().unwrap();
    let paths = framewarden::demo::DemoPaths::new(dir.path());
    let recorded = Instant::now();
    framewarden::demo::run(&scenario, &paths, &mut std::io::sink()).expect("the run is recorded");
    println!(
        "recorded 96 wells x 48 time points of {size} x {size} px in {:.0} s",
        recorded.elapsed().as_secs_f64()
    );
    let db = dir.path().join("framewarden.db");
    let out = dir.path().join("report.html");
    let started = Instant::now();
    let written = framewarden::html_report::write(&db, None, None, &out).expect("the report");
    let seconds = started.elapsed().as_secs_f64();
    let mb = written.bytes as f64 / 1e6;
    println!("report: {mb:.1} MB in {seconds:.2} s");
    println!(
        "against the budget: size {:.2} of 15 MB, time {:.2} of 10 s",
        mb / 15.0,
        seconds / 10.0
    );
}
