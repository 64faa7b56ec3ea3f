//! `gapwise serve` and `gapwise make-demo`: the pages on localhost, and the invented
//! project they show when no other is named.

use std::net::SocketAddr;
use std::path::Path;
use std::sync::Arc;

use crate::project::Project;
use crate::web;

/// `gapwise serve`: loads the project and serves it until Ctrl-C.
pub fn serve(
    dir: &Path,
    addr: SocketAddr,
    allow_remote: bool,
    projects: Option<std::path::PathBuf>,
    access: web::guard::Access,
) -> i32 {
    if !addr.ip().is_loopback() {
        if !allow_remote {
            eprintln!(
                "refusing to listen on {addr}: the server holds study data and has no login. Use a 127.0.0.1 address, or add --allow-remote if every machine that can reach {} may see the data.",
                addr.ip()
            );
            return 2;
        }
        eprintln!("warning: listening on {addr}; anyone who can reach this address can read the project's data.");
    }
    let project = match Project::load(dir) {
        Ok(p) => p,
        Err(problems) => {
            for p in &problems {
                eprintln!("{p}");
            }
            eprintln!(
                "the project in {} has problems; fix them (see `gapwise check`) and start again.",
                dir.display()
            );
            return 1;
        }
    };
    if let Some(p) = &projects {
        if let Err(e) = std::fs::create_dir_all(p) {
            eprintln!("cannot use the projects folder {}: {e}", p.display());
            return 1;
        }
    }
    let state =
        Arc::new(web::AppState::with_projects(project, projects).keeping(access.keep_versions));
    let runtime = match tokio::runtime::Runtime::new() {
        Ok(r) => r,
        Err(e) => {
            eprintln!("cannot start the server runtime: {e}");
            return 1;
        }
    };
    match runtime.block_on(web::serve(state, addr, allow_remote, access)) {
        Ok(()) => 0,
        Err(message) => {
            eprintln!("{message}");
            1
        }
    }
}

/// `gapwise make-demo DIR`: writes the invented demo project.
pub fn make_demo(dir: &Path, seed: u64) -> i32 {
    match crate::demo::write(dir, seed) {
        Ok(()) => {
            println!("wrote the demo project (seed {seed}) to {}", dir.display());
            0
        }
        Err(e) => {
            eprintln!("cannot write the demo to {}: {e}", dir.display());
            1
        }
    }
}
