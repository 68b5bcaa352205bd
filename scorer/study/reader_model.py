"""Simulated reader studies: invented human readers and a model observer reading the same images.

The generator is documented so that tests and the demo know the true thresholds.

Observer model (a linear observer in M-AFC; Green & Swets 1966; Burgess, J. Opt. Soc. Am. A 11, 1994)
-----------------------------------------------------------------------------------------------------
For a target of diameter d and contrast C on an image from detector D, the model
observer's response at candidate site j is::

    t_j = a(d, D) · C · δ_j + ε_j ,      ε_j ~ N(0, 1)

δ_j = 1 at the site holding the disc, 0 elsewhere.  ε_j is the *external* noise
(the image's noise passed through the template): it belongs to the image, so it is
shared by every observer and every repeat that reads that image.  The model
observer's d′ = a·C, so its threshold is ``C_T = d′_T / a`` with d′_T the d′ that
gives the criterion proportion correct.  ``a`` follows a contrast-detail law
``C_T,model(d) = c₁ · d^(−slope) · ratio(D, d)`` (slope ≈ 1 for a quantum-limited
detector; Rose 1948), with ``ratio`` the detector's threshold ratio to the reference.

A human reader r sees the same image but with a less efficient template and
internal noise that is fresh on every presentation::

    t_rj = √e_r · a · C · δ_j + ε_j + σ_r · ν_rj ,   ν_rj ~ N(0, 1)

so d′_r = √e_r · a · C / √(1 + σ_r²): still linear in C (a linear observer), with
human/model threshold factor ``F_r = √(1 + σ_r²) / √e_r``.  The reader picks the
site with the largest response, except on a fraction λ_r of trials (lapses) where
the choice is uniformly random.  Between readers, F_r is log-normal around
``median_factor`` with coefficient of variation ``cv_between`` (split between e_r
and σ_r), and λ_r is uniform on [0, ``lapse_max``].

The marginal proportion correct of reader r is exactly
``(1 − λ_r)·Pc_M(d′_r) + λ_r/M``, so the reader's true (lapse-free) threshold is
``C_T,r = F_r · C_T,model``.  Because the external noise is shared, readers agree
with each other and with themselves on repeats more than chance: that is what the
agreement statistics measure.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from scorer.observer.mafc import criterion_for, dprime_for_pc

#: value of the optional ``source`` column in trials made by this module
SIMULATED_SOURCE = "simulated reader model"


@dataclass
class ReaderPopulation:
    """How invented human readers differ from the model observer and from each other.

    median_factor : median human/model threshold factor F (≥ 1 for a model that is better
        than humans).
    cv_between : between-reader coefficient of variation of F (log-normal).
    internal_share : fraction of log F² due to internal noise (the rest is template inefficiency).
    lapse_max : lapse rates are uniform on [0, lapse_max].
    factor_slope : γ of a factor that depends on diameter, F_r(d) = F_r·(d / 1 mm)^γ (0: the same at every
        diameter; γ < 0: readers fall further behind the model at small details).  The reader's signal is
        scaled by (d / 1 mm)^(−γ) in :func:`simulate_reader_study`.
    """

    median_factor: float = 1.6
    cv_between: float = 0.15
    internal_share: float = 0.5
    lapse_max: float = 0.0
    factor_slope: float = 0.0


@dataclass
class SimulatedStudy:
    """Trials of human readers and of the model observer, with the truth used to make them."""

    trials: pd.DataFrame
    model_trials: pd.DataFrame
    readers: pd.DataFrame  # reader, factor, efficiency, internal_noise, lapse
    truth: pd.DataFrame  # reader ('model' for the model observer), detector, diameter_mm, threshold_contrast
    m_alternatives: int
    criterion_pc: float
    params: dict = field(default_factory=dict)
    #: the model observer's response at every candidate site (``limen score``'s responses table: the response
    #: t_j/a, an unbiased estimate of the contrast at the signal site), from which its trials are its decisions
    model_responses: pd.DataFrame | None = None


def model_threshold(diameter_mm, c1: float = 0.012, slope: float = 0.9):
    """Contrast-detail law of the invented model observer on the reference detector: c₁·d^(−slope)."""
    return c1 * np.asarray(diameter_mm, dtype=float) ** (-slope)


def simulate_reader_study(
    rng: np.random.Generator,
    n_readers: int = 6,
    *,
    detectors: dict | None = None,
    diameters_mm=(0.1, 0.25, 0.5, 1.0),
    n_contrasts: int = 10,
    contrast_span: tuple[float, float] = (0.35, 3.0),
    n_images: int = 16,
    m_alternatives: int = 4,
    n_repeats: int = 1,
    population: ReaderPopulation | None = None,
    model_name: str = "npwe",
    c1: float = 0.012,
    slope: float = 0.9,
    reader_prefix: str = "reader",
) -> SimulatedStudy:
    """Simulate a reader study: every reader reads every image of every detector.

    Parameters
    ----------
    rng : numpy Generator (the only source of randomness).
    n_readers : number of invented human readers.
    detectors : {name: threshold ratio to the reference}, a number or a {diameter_mm: ratio}
        dict per detector; default ``{"direct": 1.0, "indirect": 1.3}``.
    diameters_mm : disc diameters.
    n_contrasts : targets per diameter, log-spaced contrasts from ``contrast_span[0]`` to
        ``contrast_span[1]`` times the median human threshold on the reference detector.
    n_images : images per detector (each holds every target).
    m_alternatives : candidate sites per target.
    n_repeats : readings of each image by each reader (repeat 0, 1, ...; session = repeat + 1).
    population : :class:`ReaderPopulation`.
    model_name : ``reader`` value of the model-observer trials.

    Returns
    -------
    SimulatedStudy with the human and model trial tables (columns of :data:`scorer.study.trials.TRIAL_COLUMNS`
    plus ``response_ms``, ``session``, ``repeat``) and the true thresholds.
    """
    pop = population or ReaderPopulation()
    detectors = {"direct": 1.0, "indirect": 1.3} if detectors is None else dict(detectors)
    m = int(m_alternatives)
    diam = np.asarray(diameters_mm, dtype=float)
    crit = criterion_for(m)
    d_t = dprime_for_pc(crit, m)

    # readers
    readers = draw_readers(rng, n_readers, pop, reader_prefix)
    names = readers["reader"].tolist()
    factor, efficiency = readers["factor"].to_numpy(), readers["efficiency"].to_numpy()
    internal, lapse = readers["internal_noise"].to_numpy(), readers["lapse"].to_numpy()

    # targets: per diameter, contrasts around the median human threshold on the reference detector
    ref_ct = model_threshold(diam, c1, slope)
    rel = np.geomspace(contrast_span[0], contrast_span[1], n_contrasts)
    t_diam = np.repeat(diam, n_contrasts)
    trend = diam**pop.factor_slope  # F_r(d) / F_r
    t_contrast = np.repeat(ref_ct * pop.median_factor * trend, n_contrasts) * np.tile(rel, diam.size)
    n_targets = t_diam.size
    target_ids = [f"d{d:g}-c{j + 1:02d}" for d in diam for j in range(n_contrasts)]

    human_rows, model_rows, response_rows, truth = [], [], [], []
    for det, ratio in detectors.items():
        if isinstance(ratio, dict):
            r_d = np.array([float(ratio.get(float(d), ratio.get(d, 1.0))) for d in diam])
        else:
            r_d = np.full(diam.size, float(ratio))
        ct_model = ref_ct * r_d
        a = d_t / np.repeat(ct_model, n_contrasts)  # per target: d′_model = a·C
        for j, d in enumerate(diam):
            truth.append({"reader": "model", "detector": det, "diameter_mm": d, "threshold_contrast": ct_model[j]})
            for r, name in enumerate(names):
                truth.append(
                    {
                        "reader": name,
                        "detector": det,
                        "diameter_mm": d,
                        "threshold_contrast": ct_model[j] * factor[r] * trend[j],
                    }
                )
        signal = a * t_contrast  # (T,) model d′ per target
        true_site = rng.integers(0, m, size=(n_images, n_targets))
        ext = rng.standard_normal((n_images, n_targets, m))  # external noise, shared by all who read the image
        onehot = np.eye(m, dtype=bool)[true_site]  # (I, T, M)
        img_ids = [f"{det}-img{i + 1:03d}" for i in range(n_images)]

        def frame(reader, chosen, rep, ms, det=det, img_ids=img_ids, true_site=true_site):
            return pd.DataFrame(
                {
                    "reader": reader,
                    "detector": det,
                    "image": np.repeat(img_ids, n_targets),
                    "target": np.tile(target_ids, n_images),
                    "diameter_mm": np.tile(t_diam, n_images),
                    "contrast": np.tile(t_contrast, n_images),
                    "chosen_site": chosen.ravel(),
                    "true_site": true_site.ravel(),
                    "correct": (chosen == true_site).ravel().astype(int),
                    "response_ms": ms.ravel(),
                    "session": rep + 1,
                    "repeat": rep,
                }
            )

        t_model = ext + onehot * signal[None, :, None]
        model_rows.append(frame(model_name, np.argmax(t_model, axis=2), 0, np.zeros((n_images, n_targets), dtype=int)))
        a_t = a[None, :, None]  # responses in contrast units: t_j / a
        response_rows.append(
            pd.DataFrame(
                {
                    "image": np.repeat(img_ids, n_targets * m),
                    "detector": det,
                    "target": np.tile(np.repeat(target_ids, m), n_images),
                    "diameter_mm": np.tile(np.repeat(t_diam, m), n_images),
                    "contrast": np.tile(np.repeat(t_contrast, m), n_images),
                    "m_alternatives": m,
                    "site": np.tile(np.arange(m), n_images * n_targets),
                    "is_signal": onehot.ravel(),
                    "response": (t_model / a_t).ravel(),
                    "observer": model_name,
                }
            )
        )
        for r, name in enumerate(names):
            s_r = np.sqrt(efficiency[r]) * signal / np.repeat(trend, n_contrasts)
            for rep in range(n_repeats):
                t_r = ext + onehot * s_r[None, :, None] + internal[r] * rng.standard_normal(ext.shape)
                chosen = np.argmax(t_r, axis=2)
                lapsed = rng.random((n_images, n_targets)) < lapse[r]
                chosen = np.where(lapsed, rng.integers(0, m, size=chosen.shape), chosen)
                ms = np.round(rng.lognormal(np.log(2500), 0.4, size=chosen.shape)).astype(int)
                human_rows.append(frame(name, chosen, rep, ms))
    trials = pd.concat(human_rows, ignore_index=True)
    model_trials = pd.concat(model_rows, ignore_index=True)
    trials = trials.assign(source=SIMULATED_SOURCE)
    return SimulatedStudy(
        trials=trials,
        model_trials=model_trials,
        readers=readers,
        truth=pd.DataFrame(truth),
        m_alternatives=m,
        criterion_pc=crit,
        model_responses=pd.concat(response_rows, ignore_index=True),
        params={
            "detectors": detectors,
            "diameters_mm": diam.tolist(),
            "n_images": n_images,
            "n_contrasts": n_contrasts,
            "n_repeats": n_repeats,
            "c1": c1,
            "slope": slope,
            "population": pop.__dict__.copy(),
        },
    )


def write_demo_study(out_dir, seed: int = 2026, n_readers: int = 6, n_repeats: int = 2) -> dict:
    """Write an invented reader study (readers.csv, model.csv, truth.csv) for the demo; return paths."""
    from pathlib import Path

    from scorer.files import atomic_write_text

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    study = simulate_reader_study(np.random.default_rng(seed), n_readers, n_repeats=n_repeats)
    paths = {
        "readers": out / "reader_trials.csv",
        "model": out / "model_trials.csv",
        "truth": out / "truth.csv",
        "reader_parameters": out / "reader_parameters.csv",
    }
    for key, frame in (
        ("readers", study.trials),
        ("model", study.model_trials),
        ("truth", study.truth),
        ("reader_parameters", study.readers),
    ):
        atomic_write_text(paths[key], frame.to_csv(index=False))
    return {k: str(v) for k, v in paths.items()}


if __name__ == "__main__":  # python -m scorer.study.reader_model OUT_DIR [SEED]
    import sys

    if len(sys.argv) < 2:
        print("usage: python -m scorer.study.reader_model OUT_DIR [SEED]", file=sys.stderr)
        raise SystemExit(2)
    written = write_demo_study(sys.argv[1], int(sys.argv[2]) if len(sys.argv) > 2 else 2026)
    print("wrote " + ", ".join(written.values()))


def draw_readers(
    rng: np.random.Generator, n_readers: int, population: ReaderPopulation | None = None, reader_prefix: str = "reader"
) -> pd.DataFrame:
    """Invented readers: factor F, template efficiency e, internal noise σ and lapse λ (see module doc)."""
    pop = population or ReaderPopulation()
    sd_log = np.sqrt(np.log1p(pop.cv_between**2))
    log_f = np.log(pop.median_factor) + sd_log * rng.standard_normal(n_readers)
    factor = np.exp(log_f)
    internal = np.sqrt(np.maximum(np.exp(pop.internal_share * 2 * log_f) - 1.0, 0.0))
    efficiency = (1.0 + internal**2) / factor**2
    lapse = rng.uniform(0.0, pop.lapse_max, n_readers) if pop.lapse_max > 0 else np.zeros(n_readers)
    width = max(2, len(str(n_readers)))
    return pd.DataFrame(
        {
            "reader": [f"{reader_prefix}{i + 1:0{width}d}" for i in range(n_readers)],
            "factor": factor,
            "efficiency": efficiency,
            "internal_noise": internal,
            "lapse": lapse,
        }
    )


def response_calibration(resp: np.ndarray, sig: np.ndarray, contrast: np.ndarray) -> tuple[float, float]:
    """(g, σ_ext) of one detector × diameter from the model observer's responses (K targets × M sites, ``sig``
    marking the disc's site, ``contrast`` per target): σ_ext the spread of the non-signal sites about their mean
    within each target (M − 1 of them, so × (M − 1)/(M − 2) for the mean removed), g the mean signal-site minus
    non-signal response per unit contrast, fitted through the origin."""
    m = resp.shape[1]
    bg = np.where(sig, np.nan, resp)
    diff = resp[sig] - np.nanmean(bg, axis=1)
    if m > 2:
        sigma_ext = float(np.sqrt(np.nanmean((bg - np.nanmean(bg, axis=1, keepdims=True)) ** 2) * (m - 1) / (m - 2)))
    else:  # one non-signal site: the spread of the signal − non-signal difference about its fit, over √2
        c = np.asarray(contrast, float)
        sigma_ext = float(np.std(diff - c * (diff @ c) / (c @ c)) / np.sqrt(2))
    gain = float(diff @ contrast / (contrast @ contrast))
    return gain, sigma_ext


def simulated_choice(
    resp: np.ndarray,
    sig: np.ndarray,
    contrast: float,
    gain: float,
    sigma_ext: float,
    reader,
    rng: np.random.Generator,
) -> int:
    """The site one invented reader (a row of :func:`draw_readers`) chooses in one trial: the model observer's
    response at each site with the signal lowered to the reader's efficiency and fresh internal noise added,
    t_j = response_j − (1 − √e)·g·C·δ_j + σ·σ_ext·ν_j; the largest, or on a lapse a site at random (the model
    of :func:`readers_from_responses`, one trial at a time)."""
    resp, sig = np.asarray(resp, float), np.asarray(sig, bool)
    if rng.random() < float(reader.lapse):
        return int(rng.integers(resp.size))
    shift = (1.0 - np.sqrt(float(reader.efficiency))) * gain * float(contrast)
    t = resp - sig * shift + float(reader.internal_noise) * sigma_ext * rng.standard_normal(resp.size)
    return int(np.argmax(t))


def readers_from_responses(
    responses: pd.DataFrame, readers: pd.DataFrame, rng: np.random.Generator, n_repeats: int = 1
) -> pd.DataFrame:
    """Invented human readers reading the same phantom images as a model observer.

    ``responses`` is the model observer's per-site table from :func:`scorer.observer.npw.score_image`
    (columns image, target, diameter_mm, contrast, m_alternatives, site, is_signal, response and
    optionally detector).  For each diameter the external noise σ_ext is the spread of the
    non-signal sites about their mean within each image and target, and g, the mean signal-site
    minus non-signal response per unit contrast, is fitted through the origin.  Reader r then sees
    at every site::

        t_rj = response_j − (1 − √e_r)·g·C·δ_j + σ_r·σ_ext·ν_rj ,   ν_rj ~ N(0, 1) fresh per reading

    — the image's own signal and noise, a less efficient template and internal noise — so that
    the reader's d′ is the model's times √e_r/√(1 + σ_r²), i.e. their threshold is F_r times the
    model's.  On a fraction λ_r of trials the reader guesses.  Returns the tidy trials table.
    """
    need = {"image", "target", "diameter_mm", "contrast", "m_alternatives", "site", "is_signal", "response"}
    missing = need - set(responses.columns)
    if missing:
        raise ValueError(f"responses table lacks {sorted(missing)}")
    df = responses.sort_values(["image", "target", "site"]).reset_index(drop=True)
    det = df["detector"] if "detector" in df.columns else pd.Series("detector", index=df.index)
    df = df.assign(detector=det.astype(str))
    out = []
    for (dname, diam), g in df.groupby(["detector", "diameter_mm"], sort=True):
        m = int(g["m_alternatives"].iloc[0])
        trials = g.groupby(["image", "target"], sort=False)
        keys = list(trials.groups.keys())
        resp = g["response"].to_numpy().reshape(len(keys), m)
        sig = g["is_signal"].to_numpy(bool).reshape(len(keys), m)
        contrast = g["contrast"].to_numpy().reshape(len(keys), m)[:, 0]
        gain, sigma_ext = response_calibration(resp, sig, contrast)
        true_site = np.argmax(sig, axis=1)
        images = np.array([k[0] for k in keys])
        targets = np.array([k[1] for k in keys])
        for r in readers.itertuples(index=False):
            shift = (1.0 - np.sqrt(r.efficiency)) * gain * contrast
            for rep in range(n_repeats):
                t = resp - sig * shift[:, None] + r.internal_noise * sigma_ext * rng.standard_normal(resp.shape)
                chosen = np.argmax(t, axis=1)
                lapsed = rng.random(chosen.size) < r.lapse
                chosen = np.where(lapsed, rng.integers(0, m, size=chosen.size), chosen)
                out.append(
                    pd.DataFrame(
                        {
                            "reader": r.reader,
                            "detector": dname,
                            "image": images,
                            "target": targets,
                            "diameter_mm": diam,
                            "contrast": contrast,
                            "chosen_site": chosen,
                            "true_site": true_site,
                            "correct": (chosen == true_site).astype(int),
                            "response_ms": np.round(rng.lognormal(np.log(2500), 0.4, chosen.size)).astype(int),
                            "session": rep + 1,
                            "repeat": rep,
                        }
                    )
                )
    table = pd.concat(out, ignore_index=True)
    table["source"] = SIMULATED_SOURCE  # a report of these trials must say the readers are not people
    return table
