"""One object per chart, each with a streaming ``update`` and a vectorised ``update_many``."""

from monitor.spc.charts.attributes import PChart, UChart
from monitor.spc.charts.base import BatchResult, Chart, Point, Trace
from monitor.spc.charts.cusum import CusumChart
from monitor.spc.charts.ewma import EwmaChart
from monitor.spc.charts.shewhart import IndividualsChart, XbarRChart, XbarSChart

__all__ = [
    "BatchResult",
    "Chart",
    "CusumChart",
    "EwmaChart",
    "IndividualsChart",
    "PChart",
    "Point",
    "Trace",
    "UChart",
    "XbarRChart",
    "XbarSChart",
]
