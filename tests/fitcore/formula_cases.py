"""Invented formula cases for the blank-start tests (demo data, seeded)."""
import numpy as np

R = 8.314462618  # J/(mol K), CODATA 2018 gas constant (from memory)

# (formula, true values, x grid) - each written differently from the catalogue
CASES = [
    ("A*exp(-x/tau) + C", dict(A=3.0, tau=40.0, C=0.5), np.linspace(60, 180, 40)),
    ("A*exp(-k*x) + C", dict(A=2.0, k=0.7, C=0.3), np.linspace(0, 8, 40)),
    ("A*exp(-(x - 60)/tau) + C", dict(A=2.0, tau=30.0, C=1.0), np.linspace(60, 200, 40)),
    ("Bottom + (Top - Bottom)/(1 + 10**((logEC50 - x)*h))",
     dict(Bottom=5.0, Top=95.0, logEC50=-6.5, h=1.2), np.linspace(-9, -4, 40)),
    ("A1*exp(-x/t1) + A2*exp(-x/t2)", dict(A1=3.0, t1=1.0, A2=1.0, t2=8.0), np.linspace(0, 25, 50)),
    ("H*exp(-(x - mu)**2/(2*w**2)) + B", dict(H=4.0, mu=550.0, w=20.0, B=0.5),
     np.linspace(400, 700, 60)),
    ("Bmax*x/(Kd + x) + NS*x", dict(Bmax=100.0, Kd=3.0, NS=2.0), np.linspace(0.2, 30, 40)),
    ("B + (T - B)/(1 + exp(-(x - x50)/s))", dict(B=1.0, T=9.0, x50=50.0, s=4.0),
     np.linspace(20, 80, 40)),
    (f"A*exp(-Ea/({R}*x))", dict(A=2e8, Ea=45000.0), np.linspace(280, 360, 30)),
    ("Vmax*x/(Km + x)", dict(Vmax=12.0, Km=2.5), np.linspace(0.1, 20, 30)),
    ("a*(1 - exp(-(x - t0)/tau))", dict(a=10.0, t0=100.0, tau=40.0), np.linspace(110, 300, 40)),
    ("A*x**n + C", dict(A=0.5, n=1.5, C=2.0), np.linspace(1, 100, 40)),
    ("A/(1 + (x/x0)**n)", dict(A=50.0, x0=30.0, n=1.5), np.geomspace(0.1, 1000, 40)),
    ("y0 + A*exp(-0.6931471805599453*x/t_half)", dict(y0=0.2, A=5.0, t_half=12.0),
     np.linspace(0, 60, 40)),
    ("A*exp(-0.5*((x - mu)/s)**2)", dict(A=7.0, mu=1500.0, s=80.0), np.linspace(1000, 2000, 50)),
    ("A*exp(-(x - 2000)/tau)", dict(A=4.0, tau=25.0), np.linspace(2000, 2100, 40)),
]


def data(i):
    """Points of case ``i``: the curve, 2 % noise of its range, four outliers."""
    import fitcore

    formula, true, x = CASES[i]
    m = fitcore.resolve_model(formula)
    p = np.array([true[n] for n in m.param_names])
    f = m.f(x, p)
    rng = np.random.default_rng(100 + i)
    span = float(np.ptp(f)) or 1.0
    y = f + rng.normal(0, 0.02 * span, x.size)
    idx = rng.choice(x.size, 4, replace=False)
    y[idx] += span * rng.uniform(0.3, 0.8, 4) * np.array([1, 1, -1, 1])
    return formula, true, x, y
