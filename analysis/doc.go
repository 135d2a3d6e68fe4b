// Package analysis is heed's engine over exported attention: which keys
// each query may see (the mask rules), the one pass that reads every head
// once to check those rules and compute the per-head statistics, the exact
// partial state that shards merge, what the merged state means (findings,
// coverage, verdict, diagnoses), and the comparison of two exports. It reads
// exports through package loader, one (layer, batch item, head) matrix at a
// time, never prints, and takes a context and a progress callback for long
// work. docs/methods.md states each statistic and check with its source.
//
// The files, by what a reader looks for:
//
// Rules and checks:
//   - rules.go: Rule (the mask rules in priority order, then the row
//     checks), Rules of one block (NewRules, BlockRules): which rule forbids
//     each key of a query row (Rules.Row, Rules.Cell, Rules.CellRow).
//   - rules_cut.go: the cut check (RuleCut), a mask that blocks keys the rules
//     allow, seen where each row's mass stops; its accumulator CutAcc.
//   - rules_infer.go: InferExport, a block's kind inferred from its exact zeros
//     when nobody said it.
//   - rules_row.go: SummarizeRow, one query row described for a person.
//
// The pass and its accumulators:
//   - pass.go: Options, Analyze, AnalyzeSet and Partial.Add; the workers,
//     one head at a time each, and the head-pair (redundancy) pass.
//   - pass_f32.go: the per-cell loop over float32 rows, cut into runs of keys
//     sharing a rule.
//   - pass_raw16.go: the same loop over stored float16/bfloat16 patterns,
//     through value tables, to the same bits.
//   - pass_lowprio_linux.go, pass_lowprio_other.go: the workers' lower thread priority
//     (Options.Background).
//
// Partial results and merge:
//   - partial.go: Partial, its per-unit accumulators (HeadAcc, LeakAcc,
//     GeometryAcc), Partial.Merge, DecodePartial and Validate.
//   - partial_sum.go: Sum, the exact, order-independent accumulator that makes
//     shards merge to the same bits as one run.
//
// The table of statistics:
//   - statistic.go: Statistic, one row per per-head statistic (name, doc
//     with its source, direction, how the Survey shows it, how it is read
//     or computed); every output derives its columns from it; Register adds
//     one.
//   - statistic_rows.go: the engine for statistics declared with a row function.
//
// Results, coverage and verdict:
//   - result.go: Partial.Result turns the state into Stats per head,
//     Findings with their Locations, the Coverage of each block (what was
//     judged, the Gaps and how to close them) and the Verdict.
//   - result_extent.go: LeakExtent, the bounding box of one head's leaking
//     cells.
//
// Diagnosis:
//   - diagnose.go: Diagnosis, the likely bug behind findings, as a pattern
//     code (the Pat constants) and the facts its words need (Facts); the
//     words are internal/prose's, not the engine's.
//
// Comparing exports:
//   - compare.go: DiffHead and CompareBlocks, how much each head changed
//     between two exports of one shape.
//
// Below analysis, in their own packages (they import it; it imports none of them):
//   - analysis/trace: explaining a prediction by attention rollout,
//     attention flow and gradient-weighted relevance (trace.Trace).
//   - analysis/plan: a head-pruning plan from a Result (plan.Make).
//   - analysis/invariance: the causal-invariance check (invariance.Check),
//     whether outputs before a position P change when only inputs from P on
//     differ, with its findings and diagnoses.
package analysis
