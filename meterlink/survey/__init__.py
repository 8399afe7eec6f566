"""Walk-around surveys: a plan of points, guided capture over a meter link, spatial and time
averaging in the power domain, a live readout and the survey report (docs/survey.md)."""

__all__ = ["run_plan", "write_report"]


def __getattr__(name):  # lazy: importing the package stays cheap
    if name == "run_plan":
        from meterlink.survey.run import run_plan
        return run_plan
    if name == "write_report":
        from meterlink.survey.report import write_report
        return write_report
    raise AttributeError(name)
