"""BibTeX entries for the methods text, from the project's REFERENCES.md.

Authors, venues and years are kept as REFERENCES.md gives them (surnames only; recalled from memory there).
Where REFERENCES.md gives no title, the title below is recalled from memory too; those entries carry
``titlesource`` in the catalogue and a comment in refs.bib, so a user knows what to verify.
"""

from __future__ import annotations

import re
import unicodedata
from dataclasses import dataclass, field


@dataclass(frozen=True)
class BibEntry:
    key: str
    kind: str
    fields: tuple[tuple[str, str], ...]
    first_author: str
    years: tuple[str, ...]
    title_from_memory: bool = False
    also: tuple[str, ...] = field(default=())  # other surnames that identify it (e.g. a method name)

    def render(self) -> str:
        width = max(len(k) for k, _ in self.fields)
        body = ",\n".join(f"  {k.ljust(width)} = {{{v}}}" for k, v in self.fields)
        note = (
            "% Title recalled from memory (REFERENCES.md gives none); verify before publication.\n"
            if self.title_from_memory
            else ""
        )
        return f"{note}@{self.kind}{{{self.key},\n{body}\n}}\n"


def _e(key, kind, authors, title, venue_field, venue, year, first, memory=False, extra=(), years=None, also=()):
    fields = [("author", authors), ("title", title)]
    if venue_field:
        fields.append((venue_field, venue))
    fields += list(extra)
    fields.append(("year", year))
    return BibEntry(key, kind, tuple(fields), first, tuple(years or (year,)), memory, tuple(also))


CATALOGUE: dict[str, BibEntry] = {
    e.key: e
    for e in [
        # Explainers
        _e(
            "simonyan2014deep",
            "inproceedings",
            "Simonyan and Vedaldi and Zisserman",
            "Deep inside convolutional networks",
            "booktitle",
            "ICLR Workshop",
            "2014",
            "simonyan",
        ),
        _e(
            "shrikumar2016notjust",
            "misc",
            "Shrikumar and Greenside and Shcherbina and Kundaje",
            "Not just a black box",
            "howpublished",
            "arXiv:1605.01713",
            "2016",
            "shrikumar",
        ),
        _e(
            "shrikumar2017learning",
            "inproceedings",
            "Shrikumar and Greenside and Kundaje",
            "Learning important features through propagating activation differences",
            "booktitle",
            "ICML",
            "2017",
            "shrikumar",
            also=("deeplift",),
        ),
        _e(
            "sundararajan2017axiomatic",
            "inproceedings",
            "Sundararajan and Taly and Yan",
            "Axiomatic attribution for deep networks",
            "booktitle",
            "ICML",
            "2017",
            "sundararajan",
        ),
        _e(
            "smilkov2017smoothgrad",
            "misc",
            "Smilkov and Thorat and Kim and Viegas and Wattenberg",
            "{SmoothGrad}: removing noise by adding noise",
            "howpublished",
            "arXiv:1706.03825",
            "2017",
            "smilkov",
            memory=True,
        ),
        _e(
            "springenberg2015striving",
            "inproceedings",
            "Springenberg and Dosovitskiy and Brox and Riedmiller",
            "Striving for simplicity",
            "booktitle",
            "ICLR Workshop",
            "2015",
            "springenberg",
        ),
        _e(
            "zhou2016learning",
            "inproceedings",
            "Zhou and Khosla and Lapedriza and Oliva and Torralba",
            "Learning deep features for discriminative localization",
            "booktitle",
            "CVPR",
            "2016",
            "zhou",
        ),
        _e(
            "selvaraju2017gradcam",
            "inproceedings",
            "Selvaraju and Cogswell and Das and Vedantam and Parikh and Batra",
            "{Grad-CAM}: Visual explanations from deep networks via gradient-based localization",
            "booktitle",
            "ICCV",
            "2017",
            "selvaraju",
            memory=True,
        ),
        _e(
            "chattopadhay2018gradcampp",
            "inproceedings",
            "Chattopadhay and Sarkar and Howlader and Balasubramanian",
            "{Grad-CAM++}: Generalized gradient-based visual explanations for deep convolutional networks",
            "booktitle",
            "WACV",
            "2018",
            "chattopadhay",
            memory=True,
        ),
        _e(
            "zeiler2014visualizing",
            "inproceedings",
            "Zeiler and Fergus",
            "Visualizing and understanding convolutional networks",
            "booktitle",
            "ECCV",
            "2014",
            "zeiler",
        ),
        _e(
            "petsiuk2018rise",
            "inproceedings",
            "Petsiuk and Das and Saenko",
            "{RISE}: Randomized input sampling for explanation of black-box models",
            "booktitle",
            "BMVC",
            "2018",
            "petsiuk",
            memory=True,
        ),
        _e(
            "ribeiro2016why",
            "inproceedings",
            "Ribeiro and Singh and Guestrin",
            "``Why should {I} trust you?'': Explaining the predictions of any classifier",
            "booktitle",
            "KDD",
            "2016",
            "ribeiro",
            memory=True,
        ),
        _e(
            "lundberg2017unified",
            "inproceedings",
            "Lundberg and Lee",
            "A unified approach to interpreting model predictions",
            "booktitle",
            "NeurIPS",
            "2017",
            "lundberg",
            memory=True,
        ),
        _e(
            "kim2018tcav",
            "inproceedings",
            "Kim and Wattenberg and Gilmer and Cai and Wexler and Viegas and Sayres",
            "Interpretability beyond feature attribution: Quantitative testing with concept activation "
            "vectors "
            "({TCAV})",
            "booktitle",
            "ICML",
            "2018",
            "kim",
            memory=True,
        ),
        _e(
            "ghorbani2019towards",
            "inproceedings",
            "Ghorbani and Wexler and Zou and Kim",
            "Towards automatic concept-based explanations",
            "booktitle",
            "NeurIPS",
            "2019",
            "ghorbani",
        ),
        _e(
            "dempster1977maximum",
            "article",
            "Dempster and Laird and Rubin",
            "Maximum likelihood from incomplete data via the {EM} algorithm",
            "journal",
            "Journal of the Royal Statistical Society B",
            "1977",
            "dempster",
            memory=True,
        ),
        _e(
            "achanta2012slic",
            "article",
            "Achanta and others",
            "{SLIC} superpixels compared to state-of-the-art superpixel methods",
            "journal",
            "IEEE TPAMI",
            "2012",
            "achanta",
            memory=True,
        ),
        # Evaluation
        _e(
            "arras2022ground",
            "article",
            "Arras and Osman and Samek",
            "Ground-truth evaluation of neural network explanations",
            "journal",
            "Information Fusion",
            "2022",
            "arras",
            extra=[("volume", "81")],
        ),
        _e(
            "zhang2018topdown",
            "article",
            "Zhang and Bargal and Lin and Brandt and Shen and Sclaroff",
            "Top-down neural attention by excitation backprop",
            "journal",
            "IJCV",
            "2018",
            "zhang",
            extra=[("note", "Conference version: ECCV 2016")],
            years=("2016", "2018"),
        ),
        _e(
            "samek2017evaluating",
            "article",
            "Samek and Binder and Montavon and Lapuschkin and Mueller",
            "Evaluating the visualization of what a deep neural network has learned",
            "journal",
            "IEEE TNNLS",
            "2017",
            "samek",
            memory=True,
        ),
        _e(
            "hooker2019benchmark",
            "inproceedings",
            "Hooker and Erhan and Kindermans and Kim",
            "A benchmark for interpretability methods in deep neural networks",
            "booktitle",
            "NeurIPS",
            "2019",
            "hooker",
            memory=True,
        ),
        _e(
            "adebayo2018sanity",
            "inproceedings",
            "Adebayo and Gilmer and Muelly and Goodfellow and Hardt and Kim",
            "Sanity checks for saliency maps",
            "booktitle",
            "NeurIPS",
            "2018",
            "adebayo",
            memory=True,
        ),
        _e(
            "yeh2019infidelity",
            "inproceedings",
            "Yeh and Hsieh and Suggala and Inouye and Ravikumar",
            "On the (in)fidelity and sensitivity of explanations",
            "booktitle",
            "NeurIPS",
            "2019",
            "yeh",
            memory=True,
        ),
        _e(
            "bhatt2020evaluating",
            "inproceedings",
            "Bhatt and Weller and Moura",
            "Evaluating and aggregating feature-based model explanations",
            "booktitle",
            "IJCAI",
            "2020",
            "bhatt",
            memory=True,
        ),
        _e(
            "chalasani2020concise",
            "inproceedings",
            "Chalasani and Chen and Chowdhury and Wu and Jha",
            "Concise explanations of neural networks using adversarial training",
            "booktitle",
            "ICML",
            "2020",
            "chalasani",
            memory=True,
        ),
        _e(
            "wang2004image",
            "article",
            "Wang and Bovik and Sheikh and Simoncelli",
            "Image quality assessment: from error visibility to structural similarity",
            "journal",
            "IEEE TIP",
            "2004",
            "wang",
            memory=True,
        ),
        # Statistics
        _e(
            "demsar2006statistical",
            "article",
            "Demsar",
            "Statistical comparisons of classifiers over multiple data sets",
            "journal",
            "JMLR",
            "2006",
            "demsar",
            memory=True,
            extra=[("volume", "7")],
        ),
        _e(
            "wilcoxon1945individual",
            "article",
            "Wilcoxon",
            "Individual comparisons by ranking methods",
            "journal",
            "Biometrics Bulletin",
            "1945",
            "wilcoxon",
            memory=True,
        ),
        _e(
            "holm1979simple",
            "article",
            "Holm",
            "A simple sequentially rejective multiple test procedure",
            "journal",
            "Scandinavian Journal of Statistics",
            "1979",
            "holm",
            memory=True,
        ),
        _e(
            "efron1993introduction",
            "book",
            "Efron and Tibshirani",
            "An introduction to the bootstrap",
            "publisher",
            "Chapman and Hall",
            "1993",
            "efron",
            memory=True,
        ),
        # Models
        _e(
            "he2016deep",
            "inproceedings",
            "He and Zhang and Ren and Sun",
            "Deep residual learning for image recognition",
            "booktitle",
            "CVPR",
            "2016",
            "he",
            memory=True,
        ),
        _e(
            "howard2017mobilenets",
            "article",
            "Howard and Zhu and Chen and Kalenichenko and Wang and Weyand and Andreetto and Adam",
            "MobileNets: Efficient convolutional neural networks for mobile vision applications",
            "journal",
            "arXiv:1704.04861",
            "2017",
            "howard",
            memory=True,
        ),
    ]
}

STATISTICS_KEYS = {
    "bootstrap": "efron1993introduction",
    "wilcoxon": "wilcoxon1945individual",
    "holm": "holm1979simple",
    "friedman-nemenyi": "demsar2006statistical",
}
MODEL_KEYS = {"resnet": "he2016deep", "separable": "howard2017mobilenets"}


def _fold(text: str) -> str:
    return unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode().lower()


def keys_for_citation(text: str) -> list[str]:
    """Catalogue keys cited by a free-text citation ("Surname, Other. Title. Venue YEAR"; several may be
    joined by ';'). In each part, an entry matches when its first author's surname is a word of the part
    and, if the part names years, one of its years is among them; the earliest surname wins, and a method
    name listed in the entry (e.g. DeepLIFT) breaks ties between one author's papers."""
    out: list[str] = []
    for part in re.split(r";|\n", _fold(text or "")):
        words = re.findall(r"[a-z]+", part)
        years = set(re.findall(r"(?:19|20)\d\d", part))
        best: tuple[int, int, str] | None = None
        for e in CATALOGUE.values():
            if e.first_author not in words or (years and not years & set(e.years)):
                continue
            rank = (0 if any(a in words for a in e.also) else 1, words.index(e.first_author), e.key)
            if best is None or rank < best:
                best = rank
        if best is not None and best[2] not in out:
            out.append(best[2])
    return out


def render_bib(keys: list[str]) -> str:
    header = (
        "% refs.bib written by `xbench report`: one entry per method, metric and statistic used.\n"
        "% Bibliographic details are as listed in xbench's REFERENCES.md (recalled from memory there);\n"
        "% check them against the publications before submission.\n\n"
    )
    return header + "\n".join(CATALOGUE[k].render() for k in dict.fromkeys(keys) if k in CATALOGUE)
