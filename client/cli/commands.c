/*
 * commands.c - the one table of `worth`'s commands: for each its name, its
 * handler, the arguments and one-line summary of the global list, and its
 * help page (usage lines and text).  Every help text is printed from it:
 * `worth help` and `worth --help` (the global usage: options, the list of
 * commands, exit codes), the same on stderr when no command is given, and
 * `worth help CMD` or `worth CMD --help` (the command's page).
 *
 * The pages are the CLI's documentation: each gives the usage, every option
 * and an example; keep them in step with the parsers in models.c, feed.c,
 * query.c, admin.c, watch.c and plot.c.  Static data and lookups only; it
 * calls the command handlers and nothing calls back into it but worth.c.
 */
#include <string.h>

#include "cli.h"

/*
 * Name, handler, arguments and summary in the global list, usage lines, page
 * (struct cmd), in the order of the global list.  Kept one field group a line.
 */
/* clang-format off */
static const struct cmd cmds[] = {
    {"models", cmd_models, "", "list the models",
     "worth models",
     "Lists the models: name, dims, features, transitions applied, estimators.\n"
     "With --json: worthd's model.list reply.\n"
     "\n"
     "example:\n"
     "  worth models\n"},
    {"create", cmd_create, "SPEC.json", "create a model from a model.create spec",
     "worth create SPEC.json|-",
     "Creates a model from a JSON object with the fields of model.create\n"
     "(schema/protocol.md): model, dims, gamma, ranges, features, estimators, ...\n"
     "\"op\" is added.  A file that is not a JSON object exits 2 with its line and\n"
     "column; a spec worthd refuses exits 1 (e.g. model_exists, bad_param).\n"
     "\n"
     "example:\n"
     "  worth create station-1.json\n"
     "  with station-1.json:\n"
     "  {\"model\":\"station-1\",\"dims\":2,\"gamma\":0.99,\"ranges\":[[0,12],[0,400]],\n"
     "   \"features\":[{\"basis\":\"bias\"},{\"basis\":\"rbf\",\"centers\":5,\"width\":0.15}],\n"
     "   \"estimators\":[{\"name\":\"td\",\"kind\":\"td\",\"alpha\":0.05}]}\n"},
    {"drop", cmd_drop, "MODEL", "forget a model (--purge: and delete its rows)",
     "worth drop MODEL [--purge] [--yes]",
     "Stops the model's learner and forgets the model (queued transitions are\n"
     "discarded).  Its rows stay in the database for audit, unless --purge: then\n"
     "every row of every dropped model of that name (log, checkpoints, trainings)\n"
     "is deleted and the space given back; its events stay.  On a terminal it asks\n"
     "first.  Needs the admin role.\n"
     "\n"
     "options:\n"
     "  --purge   delete the model's rows too (model.purge)\n"
     "  --yes     do not ask\n"
     "\n"
     "examples:\n"
     "  worth drop station-1\n"
     "  worth drop station-1 --purge --yes\n"},
    {"show", cmd_show, "MODEL", "a model's spec and counters",
     "worth show MODEL",
     "The model's spec as created (defaults filled in), its counters, ranges, bases\n"
     "and estimators with their parameters.  With --json: the model.get reply.\n"
     "\n"
     "example:\n"
     "  worth show station-1\n"},
    {"feed", cmd_feed, "MODEL FILE|-", "send transitions, or a historian's samples",
     "worth feed MODEL FILE|- [--format csv|jsonl|wide|long] [--on-error stop|skip]\n"
     "                  [--x COL,...] [--x-next COL,...] [--r COL] [--terminal COL]\n"
     "                  [--time COL] [--time-format auto|iso|s|ms] [--reward COL|TAG]\n"
     "                  [--source COL] [--quality COL] [--good V,...] [--bad V,...]\n"
     "                  [--map COL=DIM,...] [--tag-column COL] [--value-column COL]\n"
     "                  [--ignore-tags TAG,...] [--delimiter C] [--decimal-comma]\n"
     "                  [--resume | --no-resume] [--frame N]",
     "Sends FILE (\"-\": standard input) to MODEL, in file order.  The model's\n"
     "dimensions (their number, names and units) come from worthd (model.get).\n"
     "Four forms, told from the header (or given with --format):\n"
     "\n"
     "transitions (csv): a header with x0 .. x{D-1}, r, xn0 .. xn{D-1}:\n"
     "  x0 .. x{D-1}        the state (or x_0 .. x_{D-1})\n"
     "  r                   the reward\n"
     "  xn0 .. xn{D-1}      the next state (or x_next0 .., x_next_0 ..); may be empty\n"
     "                      on a terminal row\n"
     "  terminal            optional: 0/1/true/false (empty = 0)\n"
     "  source              optional: the source's name (empty = the default source)\n"
     "  t, dt               optional: time of the transition and its duration in s\n"
     "  pseq                optional: the producer's sequence (default: the line number)\n"
     "jsonl: one object a line, {\"x\":[...],\"r\":R,\"x_next\":[...],\n"
     "\"terminal\":false,\"source\":\"s\",\"t\":T,\"dt\":DT} (terminal, source, t, dt, pseq\n"
     "optional); chosen when FILE ends in .jsonl or .json or starts with '{'.\n"
     "\n"
     "wide (a historian's export, one sample a row): a time column (time, timestamp,\n"
     "t, ts, datetime, or --time), a column per dimension, named as the dimension\n"
     "(\"level\", or with its unit \"level [m]\", which must match the model's) or\n"
     "mapped with --map COL=DIM, a reward column (r, reward, or --reward), and\n"
     "optional source, quality and terminal columns.  worthd pairs consecutive\n"
     "samples of a source into transitions (dt from the times), and makes none\n"
     "across a gap longer than the model's (schema/protocol.md, \"Samples\").\n"
     "long (time, tag, value rows, plus optional source and quality): the rows of one\n"
     "source and time are one sample; a tag names a dimension (or is mapped with\n"
     "--map TAG=DIM) or the reward (r, reward, or --reward TAG) or terminal.  Each\n"
     "source's rows must come in time order.  A sample missing a tag is an error\n"
     "that names it (missing_tag), never a zero; an unknown tag is an error\n"
     "(unknown_tag) unless --ignore-tags lists it.\n"
     "\n"
     "Times of sample files: ISO-8601 with a zone, 2026-12-01T12:00:00Z,\n"
     "2026-12-01 13:00:00+01:00, +0100 or +01; 'T' or a space; seconds and a fraction\n"
     "('.' or ',') optional.  Refused: a time without a zone (local time repeats an\n"
     "hour when the clocks go back), month 13, 30 February, hour 24 (write 00:00 of the\n"
     "next day), second 60.  Or epoch seconds or milliseconds: --time-format s or ms,\n"
     "or detected from the first time: 1990..2100 as seconds or as milliseconds (the\n"
     "two do not overlap); a number plausible as neither is an error\n"
     "(implausible_time), never read 1000 times off.  One file, one kind of time\n"
     "(mixed_time_units).  Each source's samples go forward in time (time_backwards,\n"
     "duplicate_time).\n"
     "\n"
     "Quality: with a quality column (quality, q, or --quality) a row whose flag is a\n"
     "--good value (default good,ok,1) is read, a --bad value (default bad,uncertain,0;\n"
     "* for every other value) is left out and counted, and any other flag is an error\n"
     "(bad_quality).  In a long file a bad reading leaves its whole sample out.\n"
     "\n"
     "Resending is safe: worthd skips a sample at or before the last it logged for its\n"
     "source, and a transition whose pseq (its pseq column, else its line number) is\n"
     "at or below the last for its source; the summary counts them as already\n"
     "logged, so an interrupted feed is simply run again.  Transitions are resumed\n"
     "this way for a file, not for standard input (its line numbers start again on\n"
     "every run) unless --resume; a second file of the same source needs a pseq column\n"
     "or --no-resume, or its first rows read as already logged (the summary says so).\n"
     "\n"
     "Transition rows without source, t and dt go in observe.bulk frames of --frame\n"
     "rows (default 4096; at most worthd's --max-batch), rows with them in batches of\n"
     "1024; samples of one source in observe.bulk frames, of several in requests of\n"
     "1024.  Every row is acknowledged as durable before the summary is printed.\n"
     "\n"
     "options:\n"
     "  --format F          csv (transitions), jsonl, wide or long: do not guess\n"
     "  --on-error stop     (default) at the first malformed row, send the rows before it,\n"
     "                      say how many were fed, and exit 2 (1 when worthd refused it)\n"
     "  --on-error skip     report each malformed row, skip it, count it in the summary\n"
     "  --x COL,COL,...     transitions: the D columns of the state, in order\n"
     "  --x-next COL,...    transitions: the D columns of the next state\n"
     "  --r COL, --reward COL   the reward column (long files: the reward's tag)\n"
     "  --terminal COL      the terminal column (long files: its tag)\n"
     "  --time COL          the time column (transitions: t)\n"
     "  --time-format F     auto (default), iso, s or ms\n"
     "  --source COL        the source column (default: source, if there is one)\n"
     "  --quality COL       the quality-flag column (default: quality or q, if there is one)\n"
     "  --good V,...        quality flags that mark a row good (default good,ok,1)\n"
     "  --bad V,...         flags that mark it bad (default bad,uncertain,0; * = all others)\n"
     "  --map COL=DIM,...   columns (wide) or tags (long) for dimensions, by name or index\n"
     "  --tag-column COL    long files: the tag column (default tag, tagname or name)\n"
     "  --value-column COL  long files: the value column (default value or val)\n"
     "  --ignore-tags T,... long files: tags to leave out (* = every unknown tag)\n"
     "  --delimiter C       the cell separator: ',' (default), ';' or tab\n"
     "  --decimal-comma     numbers with a decimal comma (4,2); needs --delimiter ';'\n"
     "  --resume            resume standard input by its line numbers too\n"
     "  --no-resume         send transitions without pseq: a resend is learnt again\n"
     "  --frame N           rows per bulk frame (1..65536)\n"
     "\n"
     "A malformed row is reported as FILE:LINE: column C: reason (JSON lines: field F;\n"
     "sample files: FILE:LINE: CODE: reason, CODE one of bad_time, implausible_time,\n"
     "mixed_time_units, time_backwards, duplicate_time, unknown_tag, missing_tag,\n"
     "bad_quality, bad_value, bad_row).  On a terminal a progress bar shows rows, rate\n"
     "and ETA; otherwise one summary line ends the feed: \"fed N rows in S s (R rows/s),\n"
     "K skipped\", then for samples the transitions paired, gaps and rows already\n"
     "logged, and on stderr what was not used: values clipped to the declared ranges,\n"
     "columns not read, rows without t, t going backwards.  With --json the summary is\n"
     "one JSON object: {\"ok\":...,\"form\":...,\"fed\":N,\"skipped\":K,\"logged\":L,\n"
     "\"paired\":P,\"gaps\":G,\"clipped\":C,\"seq\":S,...,\"error\":{\"code\",\"line\",...}}.\n"
     "\n"
     "examples:\n"
     "  worth feed station-1 log.csv --on-error skip\n"
     "  worth feed station-1 log.csv --x level,flow --x-next level2,flow2 --r reward\n"
     "  worth feed station-2 historian.csv --map LT101=level,FT205=demand --reward eur\n"
     "  worth feed station-2 tags.csv --delimiter ';' --decimal-comma --quality status \\\n"
     "      --good 192 --bad '*'\n"
     "  gateway-export | worth feed station-1 -\n"},
    {"value", cmd_value, "MODEL X1 X2 ...", "value of a state (or NAME=X ..., --file)",
     "worth value MODEL X1 X2 ... [--estimator E]\n"
     "       worth value MODEL NAME=X NAME=X ... [--estimator E]\n"
     "       worth value MODEL --file STATES.csv [--estimator E]",
     "The value of a state: every estimator's value, its own sd (rls_td only), its\n"
     "95% interval and its health (warming, ok, unhealthy, diverged), as a table in\n"
     "the reward's unit when the model has one; the headline estimator is marked *\n"
     "with the reason it answers, each estimator that is not ok with its reason,\n"
     "and the spread (see docs/answers.md).\n"
     "Give exactly D numbers in order (put \"--\" before them if the first is\n"
     "negative and looks like an option), or every dimension by name.\n"
     "With --file, one state per row: a header naming the dimensions (by name, with\n"
     "or without their unit, or x0..x{D-1}), or the first D columns by position (a\n"
     "header row of other names is skipped); prints each state with its value.\n"
     "\n"
     "options:\n"
     "  --file FILE     states to value, CSV (\"-\": standard input)\n"
     "  --estimator E   answer with estimator E only\n"
     "\n"
     "examples:\n"
     "  worth value station-1 4.2 180\n"
     "  worth value station-1 level=4.2 demand=180\n"
     "  worth value station-1 --file states.csv\n"},
    {"checkpoint", cmd_checkpoint, "MODEL", "store the model's state now",
     "worth checkpoint MODEL [--label L]",
     "Stores the state of every estimator of MODEL, after every transition\n"
     "accepted before it; prints the checkpoint's id and seq.  A labelled\n"
     "checkpoint is never deleted automatically.\n"
     "\n"
     "options:\n"
     "  --label L   a name for the checkpoint (1..63 bytes)\n"
     "\n"
     "example:\n"
     "  worth checkpoint station-1 --label before-retune\n"},
    {"checkpoints", cmd_checkpoints, "MODEL", "list a model's checkpoints",
     "worth checkpoints MODEL",
     "Lists MODEL's valid checkpoints, newest first: id, seq, time, size, label.\n"
     "\n"
     "example:\n"
     "  worth checkpoints station-1\n"},
    {"rollback", cmd_rollback, "MODEL ID", "restore a checkpoint (optionally replaying the log)",
     "worth rollback MODEL ID [--replay] [--exclude-seq A:B | --exclude-time T0/T1] [--yes]",
     "Restores every estimator of MODEL to checkpoint ID.  Without --replay every\n"
     "transition after it is marked rolled back.  With --replay the log after the\n"
     "checkpoint is learnt again, skipping the window given by sequence numbers or by\n"
     "the transitions' t (both inclusive); an exclude implies --replay.  On a\n"
     "terminal it asks first.  Needs the admin role.\n"
     "\n"
     "options:\n"
     "  --replay             re-learn the log after the checkpoint\n"
     "  --exclude-seq A:B    skip the transitions with seq A..B\n"
     "  --exclude-time T0/T1 skip the transitions with t in T0..T1: ISO-8601 times with\n"
     "                       a zone, or seconds since 1970 (also as T0:T1); transitions\n"
     "                       without t are never in the window\n"
     "  --yes                do not ask\n"
     "\n"
     "examples:\n"
     "  worth rollback station-1 7\n"
     "  worth rollback station-1 7 --exclude-seq 2500:3100\n"
     "  worth rollback station-1 7 --exclude-time 2026-12-01T06:00Z/2026-12-01T09:30Z\n"},
    {"backup", cmd_backup, "[NAME]", "copy worthd's database into its --backup-dir",
     "worth backup [NAME]",
     "Writes a consistent copy of worthd's whole database into worthd's backup\n"
     "directory (worthd --backup-dir, on worthd's machine) and prints its path.\n"
     "Without NAME worthd names it worthd-YYYYMMDDTHHMMSSZ.db (UTC).  NAME is a\n"
     "plain file name: 1..128 bytes of A-Z a-z 0-9 . _ -, not starting with '.';\n"
     "an earlier backup of that name is replaced, any other file is not.\n"
     "\n"
     "examples:\n"
     "  worth backup\n"
     "  worth backup nightly.db\n"},
    {"train", cmd_train, "MODEL", "train a replay or lstd estimator",
     "worth train MODEL [--estimator E] [--passes K]",
     "Runs training passes of a replay estimator over its buffer, or a refit of an\n"
     "lstd estimator, and prints the weight change after each pass (a bar on a\n"
     "terminal), then whether it converged.\n"
     "\n"
     "options:\n"
     "  --estimator E   the estimator (default: the model's first replay or lstd)\n"
     "  --passes K      at most K passes, 1..100000 (default 10)\n"
     "\n"
     "example:\n"
     "  worth train station-1 --estimator replay --passes 50\n"},
    {"stats", cmd_stats, "MODEL", "per-estimator figures and counters",
     "worth stats MODEL",
     "The model's counters (received, applied, queue, clipped, sources), the\n"
     "headline estimator and why (primary.*), a table of each estimator's figures\n"
     "(updates, health, td_rms, td_last, guarded, ...), its realised-return errors,\n"
     "the coverage of its intervals (share of realised returns within 1 and 2 own\n"
     "sd, 2 RMS and the reported 95% interval), and the reason of each estimator\n"
     "that is not ok.\n"
     "\n"
     "example:\n"
     "  worth stats station-1\n"},
    {"events", cmd_events, "[MODEL]", "checkpoints, rollbacks, drift alarms, restarts",
     "worth events [MODEL] [--since T] [--limit N]",
     "The model's recorded events, oldest first: create, checkpoint, rollback,\n"
     "drift (with the estimated onset and any pre-drift checkpoint), recovered,\n"
     "drop; without MODEL, the daemon's start and stop. Events are kept in the\n"
     "database and survive restarts.\n"
     "\n"
     "options:\n"
     "  --since T   only events at or after T: ISO-8601 with a zone, or seconds since\n"
     "              1970 (default 0)\n"
     "  --limit N   at most N events, 1..100000 (default 1000)\n"
     "\n"
     "example:\n"
     "  worth events station-1 --since 1764633600\n"
     "  worth events station-1 --since 2026-12-01T00:00:00+01:00\n"},
    {"watch", cmd_watch, "MODEL", "a refreshing view of the stats (q quits)",
     "worth watch MODEL [--every SECONDS] [--count N]",
     "A refreshing view of the model's stats: counters, the ingest rate since the\n"
     "last refresh, and each estimator's figures with its health, the coverage\n"
     "of its 95% interval and its own drift statistic (\"!\" while its test is in\n"
     "alarm; the banner shows the model's alarm, which follows the headline,\n"
     "marked *). On a terminal it redraws in place; press q to quit. Elsewhere\n"
     "it prints one block per refresh.\n"
     "\n"
     "options:\n"
     "  --every SECONDS  time between refreshes, 0.05..3600 (default 1)\n"
     "  --count N        stop after N refreshes (default: until q)\n"
     "\n"
     "example:\n"
     "  worth watch station-1 --every 2\n"},
    {"plot", cmd_plot, "MODEL ...", "value map or error history as SVG",
     "worth plot MODEL --x DIM --y DIM [--at X1,X2,... | --at NAME=X,...] [--estimator E]\n"
     "                  [--grid N] --out FILE.svg\n"
     "       worth plot MODEL --history [--since T] [--until T] --out FILE.svg",
     "The first form draws V as a heat map over state dimensions DIM (horizontal)\n"
     "and DIM (vertical), each across its declared range, the other dimensions held\n"
     "at --at (default: the middle of each range; named under the title), with\n"
     "axes, ticks and a colour bar whose ends say their values; the title names\n"
     "the estimator.  The second draws the model's learning history, kept by\n"
     "worthd in plant time across restarts: above, each estimator's running RMS\n"
     "TD error; below, its realised-return RMS error; against the plant's time\n"
     "(UTC) when the transitions carry t, else the transition number; checkpoints,\n"
     "rollbacks, alarms and other events marked.  Axes carry the dimensions' names\n"
     "and units and the reward's unit (V [EUR]).\n"
     "\n"
     "options:\n"
     "  --x DIM, --y DIM   dimensions for the two axes, by name or 0-based index\n"
     "  --at X1,X2,...     one value per dimension for those not plotted, or\n"
     "                     NAME=X,... for some of them (the rest: mid-range)\n"
     "  --estimator E      plot that estimator (default: the model's headline)\n"
     "  --grid N           N x N cells, 2..400 (default 48)\n"
     "  --hour SIN,COS     instead of --y: the hour of day 0..24, for a time of day\n"
     "                     encoded as sin and cos in those two dimensions\n"
     "  --history          plot the learning history instead\n"
     "  --since T, --until T  the history's window of plant time: ISO-8601 with a\n"
     "                     zone, or seconds since 1970\n"
     "  --out FILE.svg     the file to write (replaced atomically)\n"
     "\n"
     "examples:\n"
     "  worth plot station-1 --x 0 --y 2 --at 0,180,0,1 --out value-map.svg\n"
     "  worth plot station-2 --x level --y demand --out value-map.svg\n"
     "  worth plot station-2 --history --since 2026-11-30T00:00:00Z --out history.svg\n"
     "  worth plot station-1 --history --out history.svg\n"},
    {"status", cmd_status, "", "worthd's version, uptime, database, models",
     "worth status",
     "worthd's version and uptime, its connections, the database's size against\n"
     "its limit (--db-max-mb) and the free space on its disk, the daemon's\n"
     "retention default, and per model: state, transitions received, queue,\n"
     "healthy estimators, how long ago the last transition was learnt (wall\n"
     "clock) and how old the last logged one is in plant time (its t), checkpoints.\n"
     "With --json: the status reply.\n"
     "\n"
     "example:\n"
     "  worth status\n"},
    {"retention", cmd_retention, "[MODEL]", "the log's retention policy; --run applies it",
     "worth retention [MODEL] [--days D] [--transitions N | --inherit] [--run]",
     "Shows each model's retention policy (or MODEL's), sets MODEL's own, and\n"
     "with --run applies it now: transitions older than D days, beyond the\n"
     "newest N, are deleted with the checkpoints before them, always keeping\n"
     "the log back to the oldest checkpoint kept (so a rollback to any kept\n"
     "checkpoint, and recovery, give the same weights as before), and the space is\n"
     "given back.  worthd applies the policies every --retain-every seconds too.\n"
     "Needs the admin role.\n"
     "\n"
     "options:\n"
     "  --days D          keep D days (0: forever)\n"
     "  --transitions N   keep at least the newest N (0: all)\n"
     "  --inherit         use worthd's --retain-days and --retain-transitions again\n"
     "  --run             apply the policies now\n"
     "\n"
     "examples:\n"
     "  worth retention station-1 --days 90 --run\n"
     "  worth retention --run\n"},
#ifdef WORTH_FLEET
    {"fleet", cmd_fleet, "SUBCOMMAND ...", "a fleet of worthd nodes on NATS JetStream",
     "worth fleet [--nats URLS] [--via NODE] status\n"
     "       worth fleet [--nats URLS] create MODEL SPEC.json|-\n"
     "       worth fleet [--nats URLS] feed MODEL FILE|- [--id NAME]\n"
     "       worth fleet [--nats URLS] [--via NODE] value MODEL X1 X2 ...\n"
     "       worth fleet [--nats URLS] [--via NODE] ask MODEL JSON\n"
     "       worth fleet [--nats URLS] dump [MODEL]\n"
     "       worth fleet [--nats URLS] rollback MODEL --exclude-seq LO:HI|--exclude-t T0/T1 ...\n"
     "       worth fleet [--nats URLS] [--json] metrics NODE",
     "Talks to a fleet of `worthd fleet` nodes through NATS (doc/fleet.md), not to a\n"
     "worthd socket.  --nats (default $WORTH_NATS) names the servers, comma-separated.\n"
     "\n"
     "  status   every shard's owner, the stream sequence it has reached and its lag\n"
     "           (messages not yet learnt); the live nodes\n"
     "  create   checks the spec (a model.create request's fields, as `worth create`\n"
     "           takes them) with the shard's owner, puts it in the stream and waits\n"
     "           until the owner has built the model\n"
     "  feed     one JSON transition a line ({\"x\":[..],\"r\":..,\"x_next\":[..]}, or\n"
     "           {\"batch\":[...]}) into the stream; every message carries the id\n"
     "           NAME-LINE (--id, default host-pid-time), so feeding a file again with\n"
     "           the same --id within 2 minutes stores nothing twice.  Exits 0 only when\n"
     "           the stream acknowledged every line\n"
     "  value    the values of a state, from the model's owner\n"
     "  ask      any question (value, stats, state, check, checkpoint), the answer as is\n"
     "  dump     the model's messages (without MODEL: every model's) in stream order,\n"
     "           one JSON line each: {\"seq\",\"model\",\"msg\"} (\"raw\", a string, for a\n"
     "           message that is not JSON)\n"
     "  rollback re-learns the model from the stream without the windows given (stream\n"
     "           sequences, as dump shows them, or plant times of the transitions' \"t\");\n"
     "           the windows are in the stream, so every later takeover keeps them\n"
     "  metrics  a node's figures in Prometheus's text format (--json: as JSON): shards\n"
     "           owned, and per shard the consumer lag, the stream sequence applied,\n"
     "           the checkpoint's, models, transitions applied and refused\n"
     "  --via NODE  ask through that node, which forwards to the owner\n"
     "\n"
     "examples:\n"
     "  worth fleet --nats nats://127.0.0.1:4222 create pump-1 pump.json\n"
     "  worth fleet feed pump-1 transitions.jsonl --id gw-7\n"
     "  worth fleet --via node-b value pump-1 4.2 180\n"
     "  worth fleet rollback pump-1 --exclude-t 2026-03-01T00:00Z/2026-03-04T00:00Z\n"},
#endif
    {"help", cmd_help, "[COMMAND]", "this text, or a command's",
     "worth help [COMMAND]",
     "The global usage, or a command's options and an example.\n"
     "`worth COMMAND --help` is the same as `worth help COMMAND`.\n"
     "\n"
     "example:\n"
     "  worth help feed\n"},
};
/* clang-format on */

static const char global_head[] =
    "usage: worth [--socket PATH | --connect HOST:PORT] [--token-file FILE] [--json]\n"
    "             [--timeout SECONDS] COMMAND [ARGS...]\n"
    "\n"
    "The command-line client of worthd, the value-estimation daemon.\n"
    "\n"
    "global options (before the command; --json may also follow it):\n"
    "  --socket PATH        worthd's Unix socket (default $WORTH_SOCKET, else ./worthd.sock)\n"
    "  --connect HOST:PORT  connect over TCP instead (numeric host or localhost)\n"
    "  --token-file FILE    send the token in FILE (its first line) with auth first\n"
    "  --json               print worthd's reply line unchanged instead of a table\n"
    "  --timeout SECONDS    bound on each call (default 30; 0 = default)\n"
    "  --help, --version\n"
    "  --print-man, --print-completion  the manual page (roff) or the bash completion\n"
    "\n"
    "commands:\n";

static const char global_tail[] =
    "\n"
    "exit codes:\n"
    "  0  success\n"
    "  1  worthd answered with an error (printed as \"worth: CODE: message\")\n"
    "  2  usage: bad arguments, an unreadable file, malformed input, a question\n"
    "     answered no\n"
    "  3  cannot connect to worthd, or the connection was lost\n"
    "\n"
    "example:\n"
    "  worth --socket /run/worthd.sock stats station-1\n"
    "\n"
    "See 'worth help COMMAND' for a command's options.\n";

const struct cmd *cmd_find(const char *name)
{
    for (size_t i = 0; i < sizeof cmds / sizeof cmds[0]; i++)
        if (strcmp(cmds[i].name, name) == 0)
            return &cmds[i];
    return NULL;
}

void help_global(FILE *f)
{
    fputs(global_head, f);
    for (size_t i = 0; i < sizeof cmds / sizeof cmds[0]; i++) {
        char synopsis[64];
        snprintf(synopsis, sizeof synopsis, "%s%s%s", cmds[i].name, cmds[i].args[0] ? " " : "",
                 cmds[i].args);
        fprintf(f, "  %-28s%s\n", synopsis, cmds[i].summary);
    }
    fputs(global_tail, f);
}

void help_command(FILE *f, const struct cmd *cmd)
{
    fprintf(f, "usage: %s\n\n%s", cmd->usage, cmd->help);
}

int cmd_help(struct cli *cli, int argc, char **argv)
{
    (void)cli;
    if (argc < 2) {
        help_global(stdout);
        return EXIT_OK;
    }
    if (argc > 2)
        return cli_usage("help", "at most one command");
    const struct cmd *cmd = cmd_find(argv[1]);
    if (!cmd)
        return cli_usage("help", "no command \"%s\"", argv[1]);
    help_command(stdout, cmd);
    return EXIT_OK;
}

/* ---- generated documents ----------------------------------------------------------------- */

/* Writes s for roff inside .nf: backslashes as \e, '-' as \-, a leading '.' or '\'' guarded. */
static void roff_text(FILE *f, const char *s)
{
    int bol = 1;
    for (; *s; s++) {
        if (bol && (*s == '.' || *s == '\''))
            fputs("\\&", f);
        bol = *s == '\n';
        if (*s == '\\')
            fputs("\\e", f);
        else if (*s == '-')
            fputs("\\-", f);
        else
            fputc(*s, f);
    }
}

void help_man(FILE *f)
{
    fprintf(f, ".TH WORTH 1 \"\" \"worth %s\" \"User Commands\"\n", WORTH_VERSION);
    fputs(".SH NAME\nworth \\- the command\\-line client of worthd, the value\\-estimation "
          "daemon\n.SH SYNOPSIS\n.nf\n",
          f);
    roff_text(f, global_head);
    fputs(".fi\n.SH COMMANDS\n", f);
    for (size_t i = 0; i < sizeof cmds / sizeof cmds[0]; i++) {
        fputs(".SS ", f);
        roff_text(f, cmds[i].name);
        fputs("\n.nf\nusage: ", f);
        roff_text(f, cmds[i].usage);
        fputs("\n\n", f);
        roff_text(f, cmds[i].help);
        fputs(".fi\n", f);
    }
    fputs(".SH EXIT STATUS\n.nf\n", f);
    roff_text(f, global_tail);
    fputs(".fi\n.SH ENVIRONMENT\n.TP\n.B WORTH_SOCKET\nworthd's Unix socket when --socket is "
          "not given.\n.SH SEE ALSO\n.BR worthd (8)\n",
          f);
}

/* The distinct "--option" words of s, space-separated, into buf. */
static void options_of(const char *s, char *buf, size_t len)
{
    size_t n = 0;
    buf[0] = 0;
    for (const char *p = s; (p = strstr(p, "--")) != NULL;) {
        size_t w = 2;
        while ((p[w] >= 'a' && p[w] <= 'z') || p[w] == '-')
            w++;
        if (w > 2) {
            char word[64];
            snprintf(word, sizeof word, "%.*s", (int)w, p);
            int seen = 0;
            for (const char *q = buf; (q = strstr(q, word)) != NULL; q += strlen(word))
                seen |= (q == buf || q[-1] == ' ') && (q[strlen(word)] == ' ' || !q[strlen(word)]);
            if (!seen && n + w + 2 < len)
                n += (size_t)snprintf(buf + n, len - n, "%s%s", n ? " " : "", word);
        }
        p += w;
    }
}

void help_completion(FILE *f)
{
    fprintf(f,
            "# bash completion for worth %s, generated from its command table\n"
            "# (worth --print-completion).\n"
            "_worth()\n{\n"
            "    local cur=${COMP_WORDS[COMP_CWORD]} prev=${COMP_WORDS[COMP_CWORD-1]}\n"
            "    local i cmd=\n"
            "    for ((i = 1; i < COMP_CWORD; i++)); do\n"
            "        case ${COMP_WORDS[i]} in\n"
            "        --socket | --connect | --token-file | --timeout) ((i++)) ;;\n"
            "        -*) ;;\n"
            "        *) cmd=${COMP_WORDS[i]}; break ;;\n"
            "        esac\n"
            "    done\n"
            "    case $prev in\n"
            "    --socket | --token-file | --file | --out)\n"
            "        COMPREPLY=($(compgen -f -- \"$cur\"))\n"
            "        return ;;\n"
            "    esac\n"
            "    if [[ -z $cmd ]]; then\n"
            "        if [[ $cur == -* ]]; then\n"
            "            COMPREPLY=($(compgen -W \"--socket --connect --token-file --json "
            "--timeout --help --version\" -- \"$cur\"))\n"
            "        else\n"
            "            COMPREPLY=($(compgen -W \"",
            WORTH_VERSION);
    for (size_t i = 0; i < sizeof cmds / sizeof cmds[0]; i++)
        fprintf(f, "%s%s", i ? " " : "", cmds[i].name);
    fputs("\" -- \"$cur\"))\n"
          "        fi\n"
          "        return\n"
          "    fi\n"
          "    local opts=\n"
          "    case $cmd in\n",
          f);
    for (size_t i = 0; i < sizeof cmds / sizeof cmds[0]; i++) {
        char opts[1024];
        options_of(cmds[i].usage, opts, sizeof opts);
        if (strcmp(cmds[i].name, "help") == 0) {
            fputs("    help)\n        COMPREPLY=($(compgen -W \"", f);
            for (size_t k = 0; k < sizeof cmds / sizeof cmds[0]; k++)
                fprintf(f, "%s%s", k ? " " : "", cmds[k].name);
            fputs("\" -- \"$cur\"))\n        return ;;\n", f);
            continue;
        }
        fprintf(f, "    %s) opts=\"%s\" ;;\n", cmds[i].name, opts);
    }
    fputs("    esac\n"
          "    if [[ $cur == -* ]]; then\n"
          "        COMPREPLY=($(compgen -W \"$opts --json --help\" -- \"$cur\"))\n"
          "    else\n"
          "        COMPREPLY=($(compgen -f -- \"$cur\"))\n"
          "    fi\n"
          "}\n"
          "complete -F _worth worth\n",
          f);
}
