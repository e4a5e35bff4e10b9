"""``bonft check-objective my_objective.py:credit --target pass_at_k --k 4 --n 8``: check a credit before training."""
from __future__ import annotations

HELP = "check that a credit function is an unbiased gradient of the target it claims (bias and variance)"
DESCRIPTION = (
    "Load a credit function ('module:function' or 'path/to/file.py:function', signature "
    "(scores, rewards, *, k) -> credit, shapes (B, n) -> (B, n)) and compare the mean of its gradient "
    "estimate, computed exactly over every pool of n draws, with the exact gradient of the target on small "
    "categorical policies and on a tiny transformer; report bias, direction and variance against "
    "leave-one-out REINFORCE. Exit status 0 when no problem was found, 1 otherwise. bonft's own credits: "
    "bonft.objcheck:builtin.NAME (best_of_k, pass_at_k, pass_at_k_plugin, best_of_k_sft, reinforce, ...). "
    "Caution: this imports and runs the module's code."
)


def add_arguments(p) -> None:
    p.add_argument("credit", help="'module:function' or 'path/to/file.py:function'")
    p.add_argument("--target", required=True,
                   help="best_of_k, pass_at_k, best_of_k_sft, or 'file.py:payoff' giving the value of a set of k samples, "
                        "(M, k) scores, (M, k) rewards -> (M,)")
    p.add_argument("--k", type=int, required=True, help="samples the target selects from (best-of-k, pass@k)")
    p.add_argument("--n", type=int, required=True, help="samples per prompt the credit sees")
    p.add_argument("--policies", type=int, default=4,
                   help="random categorical policies with a non-zero target gradient to check (default 4)")
    p.add_argument("--outcomes", type=int, default=4, help="outcomes of each categorical policy (default 4)")
    p.add_argument("--seed", type=int, default=0, help="seed of the random policies and the transformer (default 0)")
    p.add_argument("--tolerance", type=float, default=1e-6, help="relative bias that still passes (default 1e-6)")
    p.add_argument("--time-limit", type=float, default=300.0, metavar="SECONDS",
                   help="seconds the whole check may run; a credit still running then is reported as a failed check "
                        "naming its policy and pools (default 300)")
    p.add_argument("--reuse-shift", type=float, default=None, metavar="S",
                   help="also measure sample reuse: pools drawn from a policy whose logits are moved by S x N(0, 1), "
                        "importance-weighted; reports the exact relative bias (not judged)")
    p.add_argument("--clip-ratio", type=float, default=None, metavar="EPS",
                   help="with --reuse-shift: also the clipped surrogate's bias (ratios kept in [1 - EPS, 1 + EPS])")
    p.add_argument("--skip-transformer", action="store_true", help="only the categorical policies (no transformers import)")
    p.add_argument("--plot-dir", metavar="DIR", default=None,
                   help="write objective_check.png (estimated vs exact gradient components) into this directory")
    p.add_argument("--json", metavar="PATH.json", default=None, help="write the report as JSON here")


def run(args) -> int:
    from bonft.cli.options import check_output_paths, check_seed, make_plot_dir, write_json_atomic
    from bonft.testing import check_objective

    check_seed("--seed", args.seed)
    check_output_paths(args)
    from bonft.verifiers.scoring import load_verifier  # a generic 'module:function' loader

    credit = load_verifier(args.credit)
    target = load_verifier(args.target) if ":" in args.target else args.target
    report = check_objective(credit, target=target, k=args.k, n=args.n, policies=args.policies,
                             outcomes=args.outcomes, seed=args.seed, tolerance=args.tolerance,
                             transformer=not args.skip_transformer, time_limit=args.time_limit,
                             reuse_shift=args.reuse_shift, clip_ratio=args.clip_ratio)
    print(report)
    if args.plot_dir:
        import os

        print(f"plot: {report.plot(os.path.join(make_plot_dir(args.plot_dir), 'objective_check.png'))}")
    if args.json:
        write_json_atomic(args.json, report.to_dict())
        print(f"json: {args.json}")
    return 0 if report.ok else 1
