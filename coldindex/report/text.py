"""Sentences about a stage's result, for the terminal and the report alike."""

from __future__ import annotations

from typing import Any


def skill_lines(result: Any, column: str, options: Any, flag: bool = False) -> list[str]:
    """What the skill stage found, in plain sentences.

    Parameters
    ----------
    result
        ``(skill table, hindcast, outlook, survey month)`` of
        :func:`coldindex.pipeline.run_skill`.
    column
        The target column.
    options
        The skill options (:class:`coldindex.config.SkillConfig`).
    flag
        Name options as flags (a single command) rather than config keys.
    """
    from coldindex.skill import outlook_sentence

    table, hc, ol, survey = result
    conf = options.confidence
    lines = [f"Winters labelled by the first survey after them (survey month {survey}"
             f"{'' if options.survey_month else ', from the median survey day'})."]
    best = table.sort_values(["q_value", "p_value"]).iloc[0]
    sig = table[table["q_value"] < 0.1]
    if len(sig):
        lines.append(
            f"Skill: {len(sig)} of {len(table)} month x lag combinations are significant "
            f"(q < 0.1); the strongest is {best['predictor']} at lag {best['lag']} "
            f"(r = {best['r']:.2f}, {conf:.0%} interval {best['r_lo']:.2f} to "
            f"{best['r_hi']:.2f}, n = {best['n']}, effective n = {best['n_eff']:.1f}, "
            f"q = {best['q_value']:.3f}).")
        beats = best["p_beats_persistence"]
        verdict = "beats" if beats < 1 - conf else "does not beat"
        lines.append(f"Against persistence (r = {best['r_persistence']:.2f}), it {verdict} it "
                     f"(Williams' t, one-sided p = {beats:.3f}).")
    else:
        lines.append(f"Skill: no month x lag combination is significant (smallest q = "
                     f"{best['q_value']:.2f}); the ice carries no demonstrable skill.")
    lines.append(f"Hindcast (predictor and lag chosen in each fold from lags "
                 f"{', '.join(map(str, hc.lags))}, most often lag {hc.lag}; "
                 f"leave-{hc.leave_out}-out): anomaly correlation "
                 f"{hc.anomaly_correlation:.2f}, RMSE {hc.rmse:.3g}, skill score "
                 f"{hc.msss_climatology:.2f} against climatology and "
                 f"{hc.msss_persistence:.2f} against persistence.")
    lines.append("Outlook: " + outlook_sentence(ol, column))
    return lines
