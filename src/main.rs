//! The `zonetally` binary: parses the command line and dispatches.

use clap::{Parser, Subcommand};

#[global_allocator]
static ALLOCATOR: tikv_jemallocator::Jemalloc = tikv_jemallocator::Jemalloc;

#[derive(Parser)]
#[command(
    name = "zonetally",
    version,
    about = "Conditional zone-count distributions given an observed total"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Evaluate a request document (a file, or - for standard input), or a raster, zones and
    /// total given as files and flags, and print the results.
    Eval(zonetally::cli::EvalArgs),
    /// Run the HTTP service (OGC API - Processes). Every flag is also a ZONETALLY_* variable.
    Serve(Box<zonetally::Config>),
    /// Print the service's OpenAPI document (what `openapi/openapi.json` must hold).
    Openapi,
    /// Run the benchmark workloads against the baselines and print the table.
    Bench {
        /// Run only this workload (see --list); all of them by default.
        #[arg(long)]
        workload: Option<String>,
        /// Also write every measured row as JSON to this file.
        #[arg(long)]
        json: Option<std::path::PathBuf>,
        /// List the workloads and exit.
        #[arg(long)]
        list: bool,
    },
}

fn main() {
    let cli = Cli::parse();
    match cli.command {
        Command::Eval(args) => {
            let written = zonetally::cli::eval(&args).and_then(|bytes| {
                let result = match &args.out {
                    Some(path) => std::fs::write(path, &bytes),
                    None => std::io::Write::write_all(&mut std::io::stdout(), &bytes),
                };
                result.map_err(|e| zonetally::cli::CliError {
                    message: format!("cannot write the results: {e}"),
                    code: 1,
                })
            });
            if let Err(e) = written {
                eprintln!("zonetally: {}", e.message);
                std::process::exit(e.code);
            }
        }
        Command::Openapi => print!("{}", zonetally::api::openapi_json()),
        Command::Serve(config) => {
            init_tracing(config.log_json);
            let runtime = match tokio::runtime::Builder::new_multi_thread()
                .enable_all()
                .build()
            {
                Ok(r) => r,
                Err(e) => {
                    eprintln!("zonetally: cannot start the async runtime: {e}");
                    std::process::exit(1);
                }
            };
            if let Err(e) = runtime.block_on(zonetally::api::server::serve(*config)) {
                eprintln!("zonetally: {e}");
                std::process::exit(1);
            }
        }
        Command::Bench {
            workload,
            json,
            list,
        } => bench(workload.as_deref(), json.as_deref(), list),
    }
}

fn init_tracing(json: bool) {
    use tracing_subscriber::EnvFilter;
    let filter =
        EnvFilter::try_from_env("ZONETALLY_LOG").unwrap_or_else(|_| EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    if json {
        builder.json().init();
    } else {
        builder.init();
    }
}

fn bench(workload: Option<&str>, json: Option<&std::path::Path>, list: bool) {
    use zonetally::bench;
    if list {
        print!("{}", bench::list());
        return;
    }
    let fail = |message: String, code: i32| -> ! {
        eprintln!("zonetally: {message}");
        std::process::exit(code);
    };
    let workloads = bench::select(workload).unwrap_or_else(|e| fail(e, 2));
    let report = bench::run(&workloads, &mut std::io::stderr()).unwrap_or_else(|e| fail(e, 1));
    print!("{}", bench::render(&report));
    if let Some(path) = json {
        let text = serde_json::to_string_pretty(&report)
            .unwrap_or_else(|e| fail(format!("cannot encode the report: {e}"), 1));
        std::fs::write(path, text + "\n")
            .unwrap_or_else(|e| fail(format!("cannot write --json `{}`: {e}", path.display()), 1));
    }
}
