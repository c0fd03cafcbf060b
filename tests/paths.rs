//! A scenario reads files only below its project root: the nearest folder
//! above it with a `.git`, else the scenario's own folder
//! (`hadal::check::project_root`). An include or table path that leaves it
//! (`..`, an absolute path, a symlink pointing out) is H0505, so a
//! published scenario cannot read a reviewer's files; paths that stay
//! inside, however they are spelled, are accepted.

use std::path::{Path, PathBuf};

use hadal::check::{check_file, project_root, CheckError, CheckOptions};
use hadal::diagnostic::Problem;

const HEAD: &str = "scenario paths\nspan 1 Ga to 0 Ga\nreport every 100 Myr\n";
const TAIL: &str = "reservoir a = 1e21 kg\nstage all from 1 Ga to 0 Ga\n";
const LIB: &str = "const from_lib = 1 kg\n";
const CSV: &str = "age,T\n0,1000\n1,1100\n";

/// `base/project` (with a `.git`) holding `s.hadal`, and `base/outside`
/// with a library and a table a scenario must not read.
struct Tree {
    _tmp: tempfile::TempDir,
    base: PathBuf,
    project: PathBuf,
}

fn tree() -> Tree {
    let tmp = tempfile::tempdir().unwrap();
    let base = std::fs::canonicalize(tmp.path()).unwrap();
    let project = base.join("project");
    std::fs::create_dir_all(project.join(".git")).unwrap();
    std::fs::create_dir_all(project.join("lib")).unwrap();
    std::fs::create_dir_all(base.join("outside")).unwrap();
    std::fs::write(base.join("outside/secret.hadal"), LIB).unwrap();
    std::fs::write(base.join("outside/secret.csv"), CSV).unwrap();
    std::fs::write(project.join("lib/ok.hadal"), LIB).unwrap();
    std::fs::write(project.join("lib/ok.csv"), CSV).unwrap();
    Tree {
        _tmp: tmp,
        base,
        project,
    }
}

fn check_at(path: &Path, body: &str) -> Result<(), (Vec<Problem>, hadal::span::Sources)> {
    std::fs::write(path, format!("{HEAD}{body}{TAIL}")).unwrap();
    match check_file(path, &CheckOptions::default()) {
        Ok(_) => Ok(()),
        Err(CheckError::Invalid { sources, problems }) => Err((problems, sources)),
        Err(CheckError::Io { message, .. }) => panic!("I/O: {message}"),
    }
}

/// The first error of a scenario at `path` with `body`: code, message,
/// label text, and the file and line of the label.
fn refused(path: &Path, body: &str) -> (Problem, String, usize) {
    let (problems, sources) = match check_at(path, body) {
        Ok(()) => panic!("`{body}` must be refused"),
        Err(e) => e,
    };
    let p = problems.into_iter().next().unwrap();
    let span = p.primary().unwrap();
    let file = sources.get(span.file).name.clone();
    let file = Path::new(&file)
        .file_name()
        .unwrap()
        .to_string_lossy()
        .into_owned();
    (p, file, sources.line_col(span).0)
}

fn accepted(path: &Path, body: &str) {
    if let Err((problems, _)) = check_at(path, body) {
        panic!(
            "`{body}` must be accepted: {} {}",
            problems[0].code, problems[0].message
        );
    }
}

#[test]
fn dot_dot_out_of_the_project_is_refused() {
    let t = tree();
    let s = t.project.join("s.hadal");
    for body in [
        "include \"../outside/secret.hadal\"\n",
        "include \"lib/../../outside/secret.hadal\"\n",
        "include \"../outside/no_such_file.hadal\"\n",
        "include \"../../../../../../../../etc/passwd\"\n",
        "table t = \"../outside/secret.csv\" (Ma, K)\n",
        "table t = \"./lib/../../outside/secret.csv\" (Ma, K)\n",
    ] {
        let (p, file, line) = refused(&s, body);
        assert_eq!(p.code, "H0505", "{body}");
        let written = body.split('"').nth(1).unwrap();
        assert_eq!(
            p.message,
            format!("the path `{written}` leads outside the project")
        );
        assert_eq!(p.labels[0].text, "outside the project root");
        assert_eq!((file.as_str(), line), ("s.hadal", 4), "{body}");
        let help = p.help.unwrap();
        assert!(help.contains(&t.project.display().to_string()), "{help}");
    }
}

#[test]
fn absolute_paths_are_refused() {
    let t = tree();
    let s = t.project.join("s.hadal");
    let inside = t.project.join("lib/ok.hadal").display().to_string();
    for body in [
        "include \"/etc/passwd\"\n".to_owned(),
        format!("include \"{inside}\"\n"),
        "table t = \"/etc/hostname\" (Ma, K)\n".to_owned(),
    ] {
        let (p, file, line) = refused(&s, &body);
        assert_eq!(p.code, "H0505", "{body}");
        let written = body.split('"').nth(1).unwrap();
        assert_eq!(p.message, format!("the path `{written}` is absolute"));
        assert_eq!((file.as_str(), line), ("s.hadal", 4));
    }
}

#[cfg(unix)]
#[test]
fn symlinks_that_point_out_are_refused() {
    use std::os::unix::fs::symlink;
    let t = tree();
    symlink(
        t.base.join("outside/secret.hadal"),
        t.project.join("lib/link.hadal"),
    )
    .unwrap();
    symlink(
        t.base.join("outside/secret.csv"),
        t.project.join("link.csv"),
    )
    .unwrap();
    symlink(t.base.join("outside"), t.project.join("elsewhere")).unwrap();
    let s = t.project.join("s.hadal");
    for body in [
        "include \"lib/link.hadal\"\n",
        "include \"elsewhere/secret.hadal\"\n",
        "table t = \"link.csv\" (Ma, K)\n",
        "table t = \"elsewhere/secret.csv\" (Ma, K)\n",
    ] {
        let (p, _, line) = refused(&s, body);
        assert_eq!(p.code, "H0505", "{body}");
        assert!(
            p.message.ends_with("leads outside the project"),
            "{}",
            p.message
        );
        assert_eq!(line, 4);
    }
    // A symlink whose target stays inside is fine.
    symlink(
        t.project.join("lib/ok.hadal"),
        t.project.join("alias.hadal"),
    )
    .unwrap();
    accepted(&s, "include \"alias.hadal\"\n");
}

#[test]
fn paths_inside_the_project_are_accepted_however_spelled() {
    let t = tree();
    let s = t.project.join("s.hadal");
    accepted(&s, "include \"lib/ok.hadal\"\n");
    accepted(&s, "include \"./lib/../lib/./ok.hadal\"\n");
    accepted(&s, "table t = \"lib//ok.csv\" (Ma, K)\n");
}

#[test]
fn an_include_is_resolved_from_its_own_folder() {
    let t = tree();
    // lib/a.hadal reads ../lib/ok.hadal (inside) and then ../../outside (not).
    std::fs::write(t.project.join("lib/a.hadal"), "include \"ok.hadal\"\n").unwrap();
    accepted(&t.project.join("s.hadal"), "include \"lib/a.hadal\"\n");
    std::fs::write(
        t.project.join("lib/b.hadal"),
        "# reaches out\ninclude \"../../outside/secret.hadal\"\n",
    )
    .unwrap();
    let (p, file, line) = refused(&t.project.join("s.hadal"), "include \"lib/b.hadal\"\n");
    assert_eq!(p.code, "H0505");
    // The label is in the file that wrote the path, on its line.
    assert_eq!((file.as_str(), line), ("b.hadal", 2));
}

#[test]
fn the_project_root_is_the_nearest_git_folder_else_the_scenario_folder() {
    let t = tree();
    let deep = t.project.join("studies/one");
    std::fs::create_dir_all(&deep).unwrap();
    assert_eq!(project_root(&deep.join("s.hadal")), t.project);
    // Under the project root, a scenario may read sideways and up to it.
    accepted(&deep.join("s.hadal"), "include \"../../lib/ok.hadal\"\n");
    // Without a `.git` anywhere above, the root is the scenario's folder.
    let loose = t.base.join("loose/sub");
    std::fs::create_dir_all(&loose).unwrap();
    std::fs::write(t.base.join("loose/shared.hadal"), LIB).unwrap();
    assert_eq!(project_root(&loose.join("s.hadal")), loose);
    let (p, _, _) = refused(&loose.join("s.hadal"), "include \"../shared.hadal\"\n");
    assert_eq!(p.code, "H0505");
}

#[cfg(unix)]
#[test]
fn a_project_reached_through_a_symlink_is_still_inside_itself() {
    let t = tree();
    let link = t.base.join("project_link");
    std::os::unix::fs::symlink(&t.project, &link).unwrap();
    accepted(&link.join("s.hadal"), "include \"lib/ok.hadal\"\n");
    let (p, _, _) = refused(
        &link.join("s.hadal"),
        "include \"../outside/secret.hadal\"\n",
    );
    assert_eq!(p.code, "H0505");
}

#[test]
fn a_refused_path_reads_nothing() {
    // The secret's definitions never reach the model: the only problem is
    // the path itself (no duplicate or unknown names follow from it).
    let t = tree();
    let (problems, _) = check_at(
        &t.project.join("s.hadal"),
        "include \"../outside/secret.hadal\"\nlet x = from_lib\n",
    )
    .unwrap_err();
    let codes: Vec<&str> = problems.iter().map(|p| p.code).collect();
    assert_eq!(
        codes,
        vec!["H0505", "H0201"],
        "{:?}",
        problems.iter().map(|p| &p.message).collect::<Vec<_>>()
    );
}
