//! The command line: parse → call the library → exit code. Progress and errors go to stderr.

use anyhow::{Context, Result, bail};
use clap::{Parser, Subcommand};
use ductline::cochlea::Greenwood;
use ductline::progress::Progress;
use ductline::stack::{self, LoadOptions, VoxelSize};
use ductline::{export, landmarks, phantom, pipeline, project};
use std::fmt::Write as _;
use std::io::IsTerminal;
use std::path::{Path, PathBuf};

#[derive(Parser)]
#[command(name = "ductline", version, about = "Cochlear duct geometry from micro-CT stacks (research use only; not a medical device)")]
pub struct Cli {
    #[command(subcommand)]
    pub cmd: Option<Cmd>,
}

#[derive(Subcommand)]
pub enum Cmd {
    /// Open a stack, slice folder or project in the desktop app.
    Open { path: PathBuf },
    /// Print dimensions, sample type, voxel size and its source, value range and memory size.
    Inspect {
        stack: PathBuf,
        /// Voxel size in µm: one value (isotropic) or X,Y,Z.
        #[arg(long, value_name = "X[,Y,Z]")]
        voxel_um: Option<String>,
        /// Bin 2×2×2 or 4×4×4 while loading.
        #[arg(long, default_value_t = 1)]
        bin: usize,
        /// Load only a sub-volume, in voxel indices of the whole stack (half-open ranges).
        #[arg(long, value_name = "I0:I1,J0:J1,K0:K1")]
        crop: Option<String>,
    },
    /// Write a synthetic cochlea: phantom.tif, landmarks.csv, truth.csv, truth.json.
    Phantom(PhantomArgs),
    /// Fit the centreline, measure every section and write the geometry table.
    Measure(MeasureArgs),
    /// Propose lamina and ligament landmarks along the whole spiral from seven seed points.
    Trace {
        #[arg(long)]
        stack: PathBuf,
        /// axis_base, axis_apex, window, and at least two lamina and two ligament points near the base.
        #[arg(long)]
        seeds: PathBuf,
        /// The landmark CSV to write (seeds included; `measure` takes it as it is).
        #[arg(long)]
        out: PathBuf,
        /// Angle between proposed points (degrees).
        #[arg(long, default_value_t = 10.0)]
        step_deg: f64,
        #[arg(long, value_name = "X[,Y,Z]")]
        voxel_um: Option<String>,
    },
    /// Measure many specimens: a table and JSON per specimen under OUT_DIR/NAME/, and
    /// OUT_DIR/summary.csv with one row per specimen.
    Batch {
        /// CSV with columns name,stack,landmarks or name,project (paths relative to this file).
        #[arg(long)]
        list: PathBuf,
        #[arg(long)]
        out_dir: PathBuf,
        /// Distance between sections along the centreline (mm).
        #[arg(long)]
        step_mm: Option<f64>,
        /// Species preset of the frequency map.
        #[arg(long)]
        species: Option<String>,
    },
}

/// Options of `ductline phantom`.
#[derive(clap::Args)]
pub struct PhantomArgs {
    pub outdir: PathBuf,
    #[arg(long, value_name = "X[,Y,Z]", default_value = "40")]
    pub voxel_um: String,
    /// A member of the seeded family of realistic cochleae (capsule bone, thin septa, soft tissue,
    /// modiolus, scanner effects); the options below then change only what they name.
    #[arg(long)]
    pub variant: Option<u64>,
    #[arg(long)]
    pub turns: Option<f64>,
    /// Noise standard deviation as a fraction of full scale.
    #[arg(long)]
    pub noise: Option<f64>,
    /// Contrast-to-noise ratio (bone − lumen)/σ, 5–30 (replaces --noise).
    #[arg(long)]
    pub cnr: Option<f64>,
    /// Blur sigma in voxels (0–1.5).
    #[arg(long)]
    pub blur: Option<f64>,
    /// Tilt of the modiolar axis: degrees about x, then about y.
    #[arg(long, value_name = "AX,AY")]
    pub tilt_deg: Option<String>,
    /// A mirrored (left) specimen.
    #[arg(long)]
    pub left: bool,
    /// Lateral bony wall thickness (mm).
    #[arg(long)]
    pub wall_mm: Option<f64>,
    /// Basal dip: the basal turn sinks up to this far (mm, 0–1.4) before it climbs.
    #[arg(long)]
    pub basal_dip_mm: Option<f64>,
    /// Turns embedded in capsule bone, soft tissue, modiolus with nerve core, internal auditory canal.
    #[arg(long)]
    pub embedded: bool,
    /// Air-filled labyrinth (lumen far darker than soft tissue).
    #[arg(long)]
    pub air: bool,
    /// Soft tissue (ligament, limbus, nerve) as a share of the lumen–bone step, 0–0.6 (the family
    /// draws 0.2–0.35 fluid-filled; on clinical CT of a fluid-filled ear it is a few per cent).
    #[arg(long)]
    pub tissue: Option<f64>,
    /// Ring artefacts (count), cupping (fraction, 0–0.2) and drift along z (± fraction, 0–0.1).
    #[arg(long)]
    pub rings: Option<u32>,
    #[arg(long)]
    pub cupping: Option<f64>,
    #[arg(long)]
    pub drift: Option<f64>,
    /// 8 or 16 bits per sample.
    #[arg(long, default_value_t = 16)]
    pub bits: u8,
    /// Landmark spacing (degrees) and noise (mm).
    #[arg(long)]
    pub landmark_step_deg: Option<f64>,
    #[arg(long)]
    pub landmark_noise_mm: Option<f64>,
    #[arg(long)]
    pub seed: Option<u64>,
}

/// Parses `I0:I1,J0:J1,K0:K1`.
pub fn crop_arg(s: &Option<String>) -> Result<Option<[[usize; 2]; 3]>> {
    let Some(s) = s else { return Ok(None) };
    let parts: Vec<&str> = s.split(',').collect();
    if parts.len() != 3 {
        bail!("--crop needs three ranges I0:I1,J0:J1,K0:K1, got '{s}'");
    }
    let mut out = [[0usize; 2]; 3];
    for (a, p) in parts.iter().enumerate() {
        let (lo, hi) = p.split_once(':').with_context(|| format!("--crop: '{p}' is not a range LO:HI"))?;
        out[a] = [
            lo.trim().parse().with_context(|| format!("--crop: '{lo}' is not a whole number"))?,
            hi.trim().parse().with_context(|| format!("--crop: '{hi}' is not a whole number"))?,
        ];
    }
    Ok(Some(out))
}

fn parse_list(s: &str, what: &str) -> Result<Vec<f64>> {
    s.split(',').map(|x| x.trim().parse::<f64>().with_context(|| format!("{what}: '{x}' is not a number"))).collect()
}

fn voxel_arg(s: &Option<String>) -> Result<Option<VoxelSize>> {
    match s {
        None => Ok(None),
        Some(s) => Ok(Some(VoxelSize::from_user_um(&parse_list(s, "--voxel-um")?)?)),
    }
}

/// Prints progress to stderr until `done`'s sender is dropped: a bar on a terminal, a line per 10 % otherwise.
fn report(p: Progress, label: &'static str, done: std::sync::mpsc::Receiver<()>) -> std::thread::JoinHandle<()> {
    std::thread::spawn(move || {
        let tty = std::io::stderr().is_terminal();
        let mut last = -1i32;
        // a report every 150 ms until the work ends (the sender is dropped: no wait at the end)
        while let Err(std::sync::mpsc::RecvTimeoutError::Timeout) = done.recv_timeout(std::time::Duration::from_millis(150)) {
            let f = p.fraction();
            if tty {
                let n = (f * 30.0) as usize;
                eprint!("\r{label:>10} [{}{}] {:3.0}%", "#".repeat(n), " ".repeat(30 - n), f * 100.0);
            } else if (f * 10.0) as i32 > last {
                last = (f * 10.0) as i32;
                eprintln!("{label}: {:.0}%", f * 100.0);
            }
        }
        if tty {
            eprintln!("\r{label:>10} done{}", " ".repeat(40));
        }
    })
}

/// Runs `f` with a progress report on stderr.
fn with_progress<T>(label: &'static str, f: impl FnOnce(&Progress) -> T) -> T {
    let p = Progress::new();
    let (tx, rx) = std::sync::mpsc::channel();
    let h = report(p.clone(), label, rx);
    let out = f(&p);
    drop(tx);
    let _ = h.join();
    out
}

pub fn inspect(path: &Path, voxel: Option<String>, bin: usize, crop: Option<String>) -> Result<()> {
    let opts = LoadOptions { voxel: voxel_arg(&voxel)?, bin, crop: crop_arg(&crop)?, ..Default::default() };
    let st = with_progress("loading", |p| stack::load_with_progress(path, &opts, p))?;
    let (lo, hi) = st.value_range();
    println!("file:        {}", path.display());
    println!("dimensions:  {} × {} × {} (columns × rows × slices)", st.dims[0], st.dims[1], st.dims[2]);
    println!("sample type: {}", st.samples.type_name());
    match &st.voxel {
        Some(v) => println!("voxel size:  {}", v.describe()),
        None => println!("voxel size:  unknown (give --voxel-um)"),
    }
    if lo <= hi {
        println!("value range: {lo} … {hi}");
    } else {
        println!("value range: none (every sample is NaN)");
    }
    if let Some(w) = &st.world {
        println!("world:       {}", w.describe());
    }
    let how = if st.samples.is_mapped() { "memory-mapped from the file, read on demand" } else { "in memory" };
    println!("memory:      {} bytes ({:.1} MB), {how}", st.bytes(), st.bytes() as f64 / 1e6);
    if st.origin_vox != [0.0; 3] {
        let o = st.origin_mm();
        println!("origin:      first voxel centre at ({:.4}, {:.4}, {:.4}) mm of the whole stack", o[0], o[1], o[2]);
    }
    for w in &st.warnings {
        eprintln!("warning: {w}");
    }
    Ok(())
}

#[allow(clippy::too_many_arguments)]
pub fn make_phantom(a: PhantomArgs) -> Result<()> {
    let v = parse_list(&a.voxel_um, "--voxel-um")?;
    let v = VoxelSize::from_user_um(&v)?.mm.map(|x| x * 1000.0);
    let mut spec = match a.variant {
        Some(n) => phantom::PhantomSpec::variant(n, v),
        None => phantom::PhantomSpec { voxel_um: v, ..Default::default() },
    };
    if let Some(t) = &a.tilt_deg {
        let t = parse_list(t, "--tilt-deg")?;
        if t.len() != 2 {
            bail!("--tilt-deg needs two angles AX,AY");
        }
        spec.tilt_deg = [t[0], t[1]];
    }
    let set = |x: &mut f64, v: Option<f64>| {
        if let Some(v) = v {
            *x = v
        }
    };
    set(&mut spec.turns, a.turns);
    set(&mut spec.noise, a.noise);
    set(&mut spec.blur_vox, a.blur);
    set(&mut spec.wall_mm, a.wall_mm);
    set(&mut spec.basal_dip_mm, a.basal_dip_mm);
    set(&mut spec.landmark_step_deg, a.landmark_step_deg);
    set(&mut spec.landmark_noise_mm, a.landmark_noise_mm);
    set(&mut spec.scanner.cupping, a.cupping);
    set(&mut spec.scanner.drift, a.drift);
    if let Some(c) = a.cnr {
        spec.scanner.cnr = Some(c);
    }
    if let Some(r) = a.rings {
        spec.scanner.rings = r;
        spec.scanner.ring_amp = spec.scanner.ring_amp.max(0.04);
    }
    if a.embedded && !spec.anatomy.embedded {
        let tissue = spec.levels[1];
        spec.anatomy = phantom::Anatomy {
            embedded: true,
            ligament_mm: 0.6 * spec.wall_mm.min(0.12),
            limbus_mm: 0.05,
            shelf_apex_mm: 0.015,
            nerve_core_mm: 0.8,
            canal_every_deg: 30.0,
            canal_radius_mm: 0.03,
            iac_mm: 0.8,
            nerve_level: tissue,
            iac_level: tissue,
        };
    }
    if a.air {
        spec.levels[0] = 0.03;
        spec.anatomy.iac_level = 0.03;
    }
    if let Some(share) = a.tissue {
        spec.set_tissue_share(share);
    }
    spec.left |= a.left;
    spec.bits = a.bits;
    if let Some(s) = a.seed {
        spec.seed = s;
    }
    let checks = [
        (spec.basal_dip_mm, 0.0, 2.0, "--basal-dip-mm"),
        (spec.blur_vox, 0.0, 3.0, "--blur"),
        (spec.wall_mm, 0.02, 2.0, "--wall-mm"),
        (spec.scanner.cupping, 0.0, 0.5, "--cupping"),
        (spec.scanner.drift, 0.0, 0.5, "--drift"),
        (spec.scanner.cnr.unwrap_or(10.0), 1.0, 1000.0, "--cnr"),
        (a.tissue.unwrap_or(0.3), 0.0, 0.6, "--tissue"),
    ];
    for (x, lo, hi, name) in checks {
        if !(x >= lo && x <= hi) {
            bail!("{name} {x} is outside {lo}…{hi}");
        }
    }
    let outdir = &a.outdir;
    let ph = with_progress("phantom", |p| phantom::generate(&spec, p))?;
    phantom::write(&ph, outdir)?;
    eprintln!(
        "wrote {} ({} × {} × {} voxels), landmarks.csv, truth.csv, truth.json, phantom.ductline.json; length {:.3} mm over {:.0}°",
        outdir.join("phantom.tif").display(),
        ph.stack.dims[0],
        ph.stack.dims[1],
        ph.stack.dims[2],
        ph.length_mm,
        spec.theta_max().to_degrees()
    );
    Ok(())
}

#[derive(clap::Args, Clone, Default)]
pub struct MeasureArgs {
    /// A project file (instead of --stack and --landmarks).
    pub project: Option<PathBuf>,
    #[arg(long)]
    pub stack: Option<PathBuf>,
    #[arg(long)]
    pub landmarks: Option<PathBuf>,
    /// Output CSV table.
    #[arg(long)]
    pub out: PathBuf,
    /// Also write the JSON table with metadata (outlines, centroids, volumes).
    #[arg(long)]
    pub json: Option<PathBuf>,
    /// Also write scala_vestibuli.stl and scala_tympani.stl into this folder.
    #[arg(long)]
    pub stl: Option<PathBuf>,
    /// Also write the outlines as a long CSV (section, scala, point, u_mm, v_mm, x_mm, y_mm, z_mm).
    #[arg(long)]
    pub outlines_csv: Option<PathBuf>,
    /// Also write VTK PolyData into this folder: centreline.vtp (every table column),
    /// scala_vestibuli.vtp, scala_tympani.vtp, sections.vtp.
    #[arg(long)]
    pub vtk: Option<PathBuf>,
    /// Also draw the duct profile (areas, width, wall; flagged sections marked) as .svg or .png.
    #[arg(long, value_name = "FILE.svg|FILE.png")]
    pub plot: Option<PathBuf>,
    /// The profile's horizontal axis.
    #[arg(long, value_name = "distance|angle|frequency", default_value = "distance")]
    pub plot_x: String,
    /// Distance between sections along the centreline (mm).
    #[arg(long)]
    pub step_mm: Option<f64>,
    /// Scala vestibuli's side of the bony shelf is bare (no spiral limbus): count the shelf as
    /// bone from both sides.
    #[arg(long)]
    pub bare_shelf: bool,
    #[arg(long, value_name = "X[,Y,Z]")]
    pub voxel_um: Option<String>,
    /// Species preset of the frequency map (human, cat, guinea-pig, chinchilla, macaque, gerbil, mouse).
    #[arg(long)]
    pub species: Option<String>,
    /// Bin 2×2×2 or 4×4×4 while loading (coordinates stay those of the whole stack).
    #[arg(long, default_value_t = 1)]
    pub bin: usize,
    /// Load only a sub-volume, in voxel indices of the whole stack (half-open ranges).
    #[arg(long, value_name = "I0:I1,J0:J1,K0:K1")]
    pub crop: Option<String>,
    /// The frame of the landmark CSV: the stack's (i·vx, j·vy, k·vz mm) or the file's world
    /// frame (NIfTI: RAS; DICOM, NRRD, MetaImage: LPS, as the file says).
    #[arg(long, value_name = "stack|world", default_value = "stack")]
    pub landmarks_frame: String,
    /// The frame of each row's x_mm, y_mm, z_mm in the CSV and JSON tables: the stack's, or the
    /// file's world frame (RAS or LPS, as for --landmarks-frame). Outlines, the STL/VTK surfaces
    /// and the cochlear frame stay in the stack frame.
    #[arg(long, value_name = "stack|world", default_value = "stack")]
    pub points_frame: String,
}

/// The command line's `measure`: the files asked for, the summary on stderr.
pub fn measure(a: MeasureArgs) -> Result<()> {
    let out = measure_to_files(&a, true)?;
    eprintln!("{}", out.summary());
    eprintln!("wrote {}", a.out.display());
    Ok(())
}

/// Measures one specimen and writes the files `a` asks for; progress on stderr when `show`.
fn measure_to_files(a: &MeasureArgs, show: bool) -> Result<pipeline::Outcome> {
    // asked-for outputs that cannot be written fail before the work, not after
    if a.plot.is_some() {
        plot_axis(&a.plot_x)?;
    }
    if !matches!(a.points_frame.as_str(), "stack" | "world") {
        bail!("--points-frame must be stack or world, not {:?}", a.points_frame);
    }
    if let Some(p) = &a.plot
        && !p.extension().is_some_and(|e| e.eq_ignore_ascii_case("svg") || e.eq_ignore_ascii_case("png"))
    {
        bail!("{}: a figure is written as .svg or .png", p.display());
    }
    let (out, prj, st, stack_path) = measure_one(a, show)?;
    write_outputs(a, &out, &prj, &st, &stack_path)?;
    for line in pipeline::fit_warnings(&out.centreline, &prj.landmarks) {
        eprintln!("warning: {line}");
    }
    Ok(out)
}

#[allow(clippy::type_complexity)]
fn measure_one(a: &MeasureArgs, show: bool) -> Result<(pipeline::Outcome, project::Project, stack::Stack, PathBuf)> {
    let world = match a.landmarks_frame.as_str() {
        "stack" => false,
        "world" if a.landmarks.is_some() => true,
        "world" => bail!("--landmarks-frame world applies to a landmark CSV (--landmarks); a project keeps its landmarks in the stack frame"),
        other => bail!("--landmarks-frame must be stack or world, not {other:?}"),
    };
    let (stack_path, mut prj) = match (&a.project, &a.stack, &a.landmarks) {
        (Some(p), None, None) => {
            let prj = project::Project::load(p)?;
            if let Some(w) = prj.stack_changed(p) {
                eprintln!("warning: {w}");
            }
            (prj.stack_path(p), prj)
        }
        (None, Some(s), Some(l)) => {
            // settings only: no project file is written, so the stack needs no fingerprint
            let prj = project::Project { landmarks: landmarks::read_csv(l, None)?, ..project::Project::unsaved(s) };
            (s.clone(), prj)
        }
        _ => bail!("measure needs either a PROJECT file or both --stack and --landmarks"),
    };
    if let Some(s) = a.step_mm {
        prj.measure.step_mm = s;
    }
    if a.bare_shelf {
        prj.measure.bare_shelf = true;
    }
    if let Some(sp) = &a.species {
        prj.species = sp.clone();
    }
    let gw = Greenwood::preset(&prj.species)?;
    let voxel = match voxel_arg(&a.voxel_um)? {
        Some(v) => Some(v),
        None => prj.voxel_um.map(|um| VoxelSize::from_user_um(&um)).transpose()?,
    };
    let opts = LoadOptions { voxel, bin: a.bin, crop: crop_arg(&a.crop)?, ..Default::default() };
    let st = shown(show, "loading", |p| stack::load_with_progress(&stack_path, &opts, p))?;
    for w in &st.warnings {
        eprintln!("warning: {w}");
    }
    st.voxel()?;
    // world-frame landmarks into the stack frame, by the file's own index-to-world transform
    if world {
        prj.landmarks = landmarks::from_world(&prj.landmarks, &st, a.landmarks.as_deref().unwrap_or(Path::new("")))?;
    }
    // the landmarks must lie inside the stack: a CSV names the line, a project the landmark
    let src = a.landmarks.clone().or(a.project.clone()).unwrap_or_default();
    match &a.landmarks {
        Some(_) if world => {}
        Some(l) => drop(landmarks::read_csv(l, Some(&st))?),
        None => {
            if let Some((i, l)) = landmarks::first_outside(&prj.landmarks, &st) {
                bail!(
                    "{}: landmark #{} ({}) at ({:.3}, {:.3}, {:.3}) mm lies outside the stack",
                    src.display(),
                    i + 1,
                    l.kind.as_str(),
                    l.p[0],
                    l.p[1],
                    l.p[2]
                );
            }
        }
    }
    let out = shown(show, "measuring", |p| pipeline::run(&st, &prj.landmarks, &prj.fit, &prj.measure, &prj.overrides, &gw, p))
        .map_err(|e| anyhow::anyhow!("{}: {e}", src.display()))?;
    Ok((out, prj, st, stack_path))
}

/// Runs `f` with a progress report on stderr when `show`, silently otherwise.
fn shown<T>(show: bool, label: &'static str, f: impl FnOnce(&Progress) -> T) -> T {
    if show { with_progress(label, f) } else { f(&Progress::new()) }
}

/// The figure's x axis named by `--plot-x`.
fn plot_axis(name: &str) -> Result<ductline::figure::XAxis> {
    Ok(match name {
        "distance" => ductline::figure::XAxis::Distance,
        "angle" => ductline::figure::XAxis::Angle,
        "frequency" => ductline::figure::XAxis::Frequency,
        other => bail!("--plot-x must be distance, angle or frequency, not {other:?}"),
    })
}

/// Writes the table and every extra output `a` asks for (each atomically).
fn write_outputs(a: &MeasureArgs, out: &pipeline::Outcome, prj: &project::Project, st: &stack::Stack, stack_path: &Path) -> Result<()> {
    // the rows' points in the file's world frame when asked (by its index-to-world transform)
    let in_world = match (a.points_frame.as_str(), &st.world) {
        ("world", None) => bail!("{}: the file has no index-to-world transform; --points-frame world needs one", stack_path.display()),
        ("world", Some(w)) => {
            let (mut o, mm) = (out.clone(), st.voxel()?.original_mm);
            o.rows.iter_mut().for_each(|r| r.point = w.to_world(r.point, mm));
            Some(o)
        }
        _ => None,
    };
    // the tables' rows (surfaces, outlines and figure stay as measured)
    let table = in_world.as_ref().unwrap_or(out);
    project::write_atomic(&a.out, export::table_csv(&table.rows).as_bytes())?;
    if let Some(j) = &a.json {
        let vox = st.voxel()?;
        let bytes = std::fs::metadata(stack_path).map(|m| m.len()).unwrap_or(0);
        let prov = export::Provenance { stack_path, stack_bytes: bytes, voxel: vox, fit: &prj.fit, measure: &prj.measure };
        let mut v = export::table_json(table, &prov);
        let frame = match (&st.world, in_world.is_some()) {
            (Some(w), true) => format!("{} mm (the file's world frame); outlines, centroids and the cochlear frame in stack mm", w.frame),
            _ => "stack mm (i·vx, j·vy, k·vz)".to_string(),
        };
        v["metadata"]["points_frame"] = serde_json::json!(frame);
        if let Some(w) = &st.world {
            v["metadata"]["index_to_world"] = serde_json::json!({ "frame": w.frame, "source": w.source, "matrix_rows": w.matrix,
                "file_voxel_mm": st.voxel()?.original_mm,
                "note": "world = M · (i, j, k, 1) with (i, j, k) = a stack-frame point divided by file_voxel_mm" });
        }
        let text = serde_json::to_string_pretty(&v)?;
        project::write_atomic(j, text.as_bytes())?;
    }
    if let Some(dir) = &a.stl {
        export::write_stl(out, dir)?;
    }
    if let Some(f) = &a.outlines_csv {
        project::write_atomic(f, export::outlines_csv(out).as_bytes())?;
    }
    if let Some(dir) = &a.vtk {
        ductline::vtk::write(out, dir)?;
    }
    if let Some(f) = &a.plot {
        let x = plot_axis(&a.plot_x)?;
        let title = format!("{} — duct profile", stack_path.file_name().map(|n| n.to_string_lossy().to_string()).unwrap_or_default());
        ductline::figure::write(&out.rows, x, &title, f)?;
    }
    Ok(())
}

/// One specimen of a batch list: its name and what to measure.
struct Specimen {
    name: String,
    args: MeasureArgs,
}

/// Reads a batch list: a header with `name` and either `stack` and `landmarks` or `project`;
/// paths relative to the list's folder.
fn read_list(list: &Path) -> Result<Vec<Specimen>> {
    let text = std::fs::read_to_string(list).with_context(|| format!("{}: cannot read", list.display()))?;
    let base = list.parent().unwrap_or(Path::new("."));
    let mut lines = text.lines().enumerate().filter(|(_, l)| !l.trim().is_empty() && !l.trim_start().starts_with('#'));
    let (_, header) = lines.next().with_context(|| format!("{}: empty list", list.display()))?;
    let cols: Vec<String> = header.split(',').map(|c| c.trim().to_lowercase()).collect();
    let at = |name: &str| cols.iter().position(|c| c == name);
    let name_col = at("name").with_context(|| format!("{}: line 1: no 'name' column", list.display()))?;
    let (stack_col, lm_col, prj_col) = (at("stack"), at("landmarks"), at("project"));
    if prj_col.is_none() && (stack_col.is_none() || lm_col.is_none()) {
        bail!("{}: line 1: the columns must be name,stack,landmarks or name,project", list.display());
    }
    let mut out: Vec<Specimen> = vec![];
    for (i, line) in lines {
        let cells: Vec<&str> = line.split(',').map(str::trim).collect();
        let cell = |c: Option<usize>| c.and_then(|c| cells.get(c)).filter(|v| !v.is_empty()).map(|v| base.join(v));
        let name = cells.get(name_col).copied().unwrap_or("").to_string();
        if name.is_empty() || name.contains(['/', '\\']) || name == "." || name == ".." {
            bail!("{}: line {}: '{name}' is not a usable specimen name (a folder of that name is written)", list.display(), i + 1);
        }
        if out.iter().any(|s| s.name == name) {
            bail!("{}: line {}: the name '{name}' is used twice", list.display(), i + 1);
        }
        let args = MeasureArgs {
            project: cell(prj_col),
            stack: cell(stack_col),
            landmarks: cell(lm_col),
            bin: 1,
            landmarks_frame: "stack".into(),
            points_frame: "stack".into(),
            ..Default::default()
        };
        out.push(Specimen { name, args });
    }
    if out.is_empty() {
        bail!("{}: no specimens listed", list.display());
    }
    Ok(out)
}

/// `ductline batch`: every specimen measured in turn (each run uses every core), a line per
/// specimen on stderr; a failing specimen's error goes into the summary and the others go on;
/// the exit code is non-zero when any failed.
pub fn batch(list: &Path, out_dir: &Path, step_mm: Option<f64>, species: Option<String>) -> Result<()> {
    let specimens = read_list(list)?;
    std::fs::create_dir_all(out_dir).with_context(|| format!("{}: cannot create", out_dir.display()))?;
    let n = specimens.len();
    let workers = batch_workers(&specimens);
    if workers > 1 {
        eprintln!("measuring {n} specimens, {workers} at a time");
    }
    // each specimen's summary row (Ok) or error cell (Err), in list order
    let rows: Vec<std::sync::Mutex<Option<std::result::Result<String, String>>>> = (0..n).map(|_| std::sync::Mutex::new(None)).collect();
    let (next, done) = (std::sync::atomic::AtomicUsize::new(0), std::sync::atomic::AtomicUsize::new(0));
    std::thread::scope(|scope| {
        for _ in 0..workers {
            scope.spawn(|| {
                loop {
                    let k = next.fetch_add(1, std::sync::atomic::Ordering::SeqCst);
                    let Some(sp) = specimens.get(k) else { break };
                    let row = batch_one(sp, out_dir, step_mm, species.clone());
                    let d = done.fetch_add(1, std::sync::atomic::Ordering::SeqCst) + 1;
                    match &row {
                        Ok((_, line)) => eprintln!("[{d}/{n}] {}: {line}", sp.name),
                        Err(msg) => eprintln!("[{d}/{n}] {}: failed: {msg}", sp.name),
                    }
                    *rows[k].lock().unwrap_or_else(|e| e.into_inner()) = Some(row.map(|(r, _)| r));
                }
            });
        }
    });
    let mut summary = String::from("name,length_mm,depth_deg,turns,handedness,sv_volume_mm3,st_volume_mm3,basal_diameter_mm,sections,flagged_sections,error\n");
    let mut failed = 0;
    for (sp, row) in specimens.iter().zip(rows) {
        match row.into_inner().unwrap_or_else(|e| e.into_inner()) {
            Some(Ok(r)) => summary.push_str(&r),
            Some(Err(msg)) => {
                failed += 1;
                let _ = writeln!(summary, "{},,,,,,,,,,{msg}", sp.name);
            }
            None => unreachable!("every specimen is taken by a worker"),
        }
    }
    let path = out_dir.join("summary.csv");
    project::write_atomic(&path, summary.as_bytes())?;
    eprintln!("wrote {}", path.display());
    if failed > 0 {
        bail!("{failed} of {n} specimens failed (their errors are in {})", path.display());
    }
    Ok(())
}

/// One specimen of a batch: its summary row and progress line, or its error as one plain CSV
/// cell (no commas, quotes or line breaks).
fn batch_one(sp: &Specimen, out_dir: &Path, step_mm: Option<f64>, species: Option<String>) -> std::result::Result<(String, String), String> {
    let dir = out_dir.join(&sp.name);
    let args = MeasureArgs { out: dir.join("table.csv"), json: Some(dir.join("table.json")), step_mm, species, ..sp.args.clone() };
    let out = std::fs::create_dir_all(&dir)
        .map_err(anyhow::Error::from)
        .and_then(|_| measure_to_files(&args, false))
        .map_err(|e| format!("{e:#}").replace(['\n', '"'], " ").replace(',', ";"))?;
    let cl = &out.centreline;
    let f = |x: Option<f64>| x.map(|v| format!("{v:.4}")).unwrap_or_default();
    let hand = format!("{:?}", cl.frame.handed).to_lowercase();
    let row = format!(
        "{},{:.4},{:.1},{:.3},{hand},{},{},{},{},{},\n",
        sp.name,
        cl.length,
        cl.depth_deg(),
        cl.depth_deg() / 360.0,
        f(export::volume(&out.geoms, &out.rows, true)),
        f(export::volume(&out.geoms, &out.rows, false)),
        f(out.estimates.as_ref().ok().map(|e| e.basal_diameter_mm)),
        out.rows.len(),
        out.flagged_sections()
    );
    let line = format!("{:.2} mm over {:.0}°, {} of {} sections flagged", cl.length, cl.depth_deg(), out.flagged_sections(), out.rows.len());
    Ok((row, line))
}

/// How many specimens a batch measures at once: one per core, as far as the memory available
/// now holds four times the largest stack file each (the voxels, a decompressed copy, the
/// sections); one where the free memory cannot be read (outside Linux) or a size is unknown.
fn batch_workers(specimens: &[Specimen]) -> usize {
    let cores = std::thread::available_parallelism().map_or(1, |c| c.get());
    let Some(free) = std::fs::read_to_string("/proc/meminfo")
        .ok()
        .and_then(|m| m.lines().find(|l| l.starts_with("MemAvailable:"))?.split_whitespace().nth(1)?.parse::<u64>().ok().map(|kb| kb * 1024))
    else {
        return 1;
    };
    let size = |p: &Path| -> Option<u64> {
        let m = std::fs::metadata(p).ok()?;
        if m.is_dir() { std::fs::read_dir(p).ok().map(|d| d.flatten().filter_map(|e| e.metadata().ok()).map(|m| m.len()).sum()) } else { Some(m.len()) }
    };
    let mut largest = 0u64;
    for sp in specimens {
        // a project keeps its stack's size on disk
        let bytes = match (&sp.args.stack, &sp.args.project) {
            (Some(st), _) => size(st),
            (None, Some(p)) => project::Project::load(p).ok().map(|prj| prj.stack.bytes),
            (None, None) => None,
        };
        match bytes {
            Some(b) => largest = largest.max(b),
            None => return 1,
        }
    }
    (free / (4 * largest.max(1))).clamp(1, cores.min(specimens.len()).max(1) as u64) as usize
}

/// `ductline trace`: proposals written with the seeds; where and why it stopped on stderr.
pub fn trace(stack_path: &Path, seeds: &Path, out: &Path, step_deg: f64, voxel_um: Option<String>) -> Result<()> {
    let opts = LoadOptions { voxel: voxel_arg(&voxel_um)?, ..Default::default() };
    let st = with_progress("loading", |p| stack::load_with_progress(stack_path, &opts, p))?;
    for w in &st.warnings {
        eprintln!("warning: {w}");
    }
    let seeds_lm = landmarks::read_csv(seeds, Some(&st))?;
    let t = ductline::trace::trace(&st, &seeds_lm, step_deg).map_err(|e| anyhow::anyhow!("{}: {e}", seeds.display()))?;
    project::write_atomic(out, ductline::trace::to_csv(&seeds_lm, &t).as_bytes())?;
    let low = t.proposed.iter().filter(|p| p.confidence < 0.5).count();
    eprintln!(
        "proposed {} landmarks to {:.0}° ({:.2} turns); stopped: {}; {low} below confidence 0.5",
        t.proposed.len(),
        t.stopped_deg,
        t.stopped_deg / 360.0,
        t.reason
    );
    eprintln!("wrote {}", out.display());
    Ok(())
}
