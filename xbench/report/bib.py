"""BibTeX entries for the methods text: full author lists, full titles, venues, volumes, pages and DOIs.

The works are the ones the project cites (its list of sources); the bibliographic details (first names,
pages, DOIs) are recalled from memory, checked for consistency with each publisher's numbering scheme but
not against the publications themselves. An entry without pages or DOI is one where none is known here.
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


def _paper(key, kind, authors, title, venue_field, venue, year, first, *, also=(), years=None, **extra):
    """One entry; ``extra`` holds volume, number, pages, doi, eprint, note (in BibTeX's order below)."""
    order = ("volume", "number", "pages", "publisher", "series", "eprint", "archiveprefix", "doi", "note")
    fields = [(k, extra[k]) for k in order if k in extra]
    return _e(
        key, kind, " and ".join(authors), title, venue_field, venue, year, first, extra=fields, years=years, also=also
    )


CATALOGUE: dict[str, BibEntry] = {
    e.key: e
    for e in [
        # Explainers
        _paper(
            "simonyan2014deep",
            "inproceedings",
            ["Simonyan, Karen", "Vedaldi, Andrea", "Zisserman, Andrew"],
            "Deep inside convolutional networks: Visualising image classification models and saliency maps",
            "booktitle",
            "International Conference on Learning Representations (ICLR), Workshop Track",
            "2014",
            "simonyan",
            eprint="1312.6034",
            archiveprefix="arXiv",
        ),
        _paper(
            "shrikumar2016notjust",
            "misc",
            ["Shrikumar, Avanti", "Greenside, Peyton", "Shcherbina, Anna", "Kundaje, Anshul"],
            "Not just a black box: Learning important features through propagating activation differences",
            "howpublished",
            "arXiv preprint arXiv:1605.01713",
            "2016",
            "shrikumar",
            eprint="1605.01713",
            archiveprefix="arXiv",
        ),
        _paper(
            "shrikumar2017learning",
            "inproceedings",
            ["Shrikumar, Avanti", "Greenside, Peyton", "Kundaje, Anshul"],
            "Learning important features through propagating activation differences",
            "booktitle",
            "Proceedings of the 34th International Conference on Machine Learning (ICML)",
            "2017",
            "shrikumar",
            also=("deeplift",),
            series="Proceedings of Machine Learning Research",
            volume="70",
            pages="3145--3153",
        ),
        _paper(
            "sundararajan2017axiomatic",
            "inproceedings",
            ["Sundararajan, Mukund", "Taly, Ankur", "Yan, Qiqi"],
            "Axiomatic attribution for deep networks",
            "booktitle",
            "Proceedings of the 34th International Conference on Machine Learning (ICML)",
            "2017",
            "sundararajan",
            series="Proceedings of Machine Learning Research",
            volume="70",
            pages="3319--3328",
        ),
        _paper(
            "smilkov2017smoothgrad",
            "misc",
            ["Smilkov, Daniel", "Thorat, Nikhil", "Kim, Been", "Vi{\\'e}gas, Fernanda", "Wattenberg, Martin"],
            "{SmoothGrad}: removing noise by adding noise",
            "howpublished",
            "arXiv preprint arXiv:1706.03825",
            "2017",
            "smilkov",
            eprint="1706.03825",
            archiveprefix="arXiv",
        ),
        _paper(
            "springenberg2015striving",
            "inproceedings",
            ["Springenberg, Jost Tobias", "Dosovitskiy, Alexey", "Brox, Thomas", "Riedmiller, Martin"],
            "Striving for simplicity: The all convolutional net",
            "booktitle",
            "International Conference on Learning Representations (ICLR), Workshop Track",
            "2015",
            "springenberg",
            eprint="1412.6806",
            archiveprefix="arXiv",
        ),
        _paper(
            "zhou2016learning",
            "inproceedings",
            ["Zhou, Bolei", "Khosla, Aditya", "Lapedriza, Agata", "Oliva, Aude", "Torralba, Antonio"],
            "Learning deep features for discriminative localization",
            "booktitle",
            "IEEE Conference on Computer Vision and Pattern Recognition (CVPR)",
            "2016",
            "zhou",
            pages="2921--2929",
            doi="10.1109/CVPR.2016.319",
        ),
        _paper(
            "selvaraju2017gradcam",
            "inproceedings",
            [
                "Selvaraju, Ramprasaath R.",
                "Cogswell, Michael",
                "Das, Abhishek",
                "Vedantam, Ramakrishna",
                "Parikh, Devi",
                "Batra, Dhruv",
            ],
            "{Grad-CAM}: Visual explanations from deep networks via gradient-based localization",
            "booktitle",
            "IEEE International Conference on Computer Vision (ICCV)",
            "2017",
            "selvaraju",
            pages="618--626",
            doi="10.1109/ICCV.2017.74",
        ),
        _paper(
            "chattopadhay2018gradcampp",
            "inproceedings",
            ["Chattopadhay, Aditya", "Sarkar, Anirban", "Howlader, Prantik", "Balasubramanian, Vineeth N."],
            "{Grad-CAM++}: Generalized gradient-based visual explanations for deep convolutional networks",
            "booktitle",
            "IEEE Winter Conference on Applications of Computer Vision (WACV)",
            "2018",
            "chattopadhay",
            pages="839--847",
            doi="10.1109/WACV.2018.00097",
        ),
        _paper(
            "zeiler2014visualizing",
            "inproceedings",
            ["Zeiler, Matthew D.", "Fergus, Rob"],
            "Visualizing and understanding convolutional networks",
            "booktitle",
            "European Conference on Computer Vision (ECCV)",
            "2014",
            "zeiler",
            series="Lecture Notes in Computer Science",
            volume="8689",
            pages="818--833",
            doi="10.1007/978-3-319-10590-1_53",
        ),
        _paper(
            "petsiuk2018rise",
            "inproceedings",
            ["Petsiuk, Vitali", "Das, Abir", "Saenko, Kate"],
            "{RISE}: Randomized input sampling for explanation of black-box models",
            "booktitle",
            "British Machine Vision Conference (BMVC)",
            "2018",
            "petsiuk",
            eprint="1806.07421",
            archiveprefix="arXiv",
        ),
        _paper(
            "ribeiro2016why",
            "inproceedings",
            ["Ribeiro, Marco Tulio", "Singh, Sameer", "Guestrin, Carlos"],
            "``Why should {I} trust you?'': Explaining the predictions of any classifier",
            "booktitle",
            "Proceedings of the 22nd ACM SIGKDD International Conference on Knowledge Discovery and Data Mining (KDD)",
            "2016",
            "ribeiro",
            pages="1135--1144",
            doi="10.1145/2939672.2939778",
        ),
        _paper(
            "lundberg2017unified",
            "inproceedings",
            ["Lundberg, Scott M.", "Lee, Su-In"],
            "A unified approach to interpreting model predictions",
            "booktitle",
            "Advances in Neural Information Processing Systems 30 (NeurIPS)",
            "2017",
            "lundberg",
            pages="4765--4774",
        ),
        _paper(
            "kim2018tcav",
            "inproceedings",
            [
                "Kim, Been",
                "Wattenberg, Martin",
                "Gilmer, Justin",
                "Cai, Carrie",
                "Wexler, James",
                "Vi{\\'e}gas, Fernanda",
                "Sayres, Rory",
            ],
            "Interpretability beyond feature attribution: Quantitative testing with concept activation vectors "
            "({TCAV})",
            "booktitle",
            "Proceedings of the 35th International Conference on Machine Learning (ICML)",
            "2018",
            "kim",
            series="Proceedings of Machine Learning Research",
            volume="80",
            pages="2668--2677",
        ),
        _paper(
            "ghorbani2019towards",
            "inproceedings",
            ["Ghorbani, Amirata", "Wexler, James", "Zou, James", "Kim, Been"],
            "Towards automatic concept-based explanations",
            "booktitle",
            "Advances in Neural Information Processing Systems 32 (NeurIPS)",
            "2019",
            "ghorbani",
        ),
        _paper(
            "dempster1977maximum",
            "article",
            ["Dempster, Arthur P.", "Laird, Nan M.", "Rubin, Donald B."],
            "Maximum likelihood from incomplete data via the {EM} algorithm",
            "journal",
            "Journal of the Royal Statistical Society: Series B (Methodological)",
            "1977",
            "dempster",
            volume="39",
            number="1",
            pages="1--38",
            doi="10.1111/j.2517-6161.1977.tb01600.x",
        ),
        _paper(
            "achanta2012slic",
            "article",
            [
                "Achanta, Radhakrishna",
                "Shaji, Appu",
                "Smith, Kevin",
                "Lucchi, Aurelien",
                "Fua, Pascal",
                'S{\\"u}sstrunk, Sabine',
            ],
            "{SLIC} superpixels compared to state-of-the-art superpixel methods",
            "journal",
            "IEEE Transactions on Pattern Analysis and Machine Intelligence",
            "2012",
            "achanta",
            volume="34",
            number="11",
            pages="2274--2282",
            doi="10.1109/TPAMI.2012.120",
        ),
        # Evaluation
        _paper(
            "arras2022clevrxai",
            "article",
            ["Arras, Leila", "Osman, Ahmed", "Samek, Wojciech"],
            "{CLEVR-XAI}: A benchmark dataset for the ground truth evaluation of neural network explanations",
            "journal",
            "Information Fusion",
            "2022",
            "arras",
            volume="81",
            pages="14--40",
            doi="10.1016/j.inffus.2021.11.008",
        ),
        _paper(
            "everingham2010pascal",
            "article",
            ["Everingham, Mark", "Van Gool, Luc", "Williams, Christopher K. I.", "Winn, John", "Zisserman, Andrew"],
            "The {PASCAL} Visual Object Classes ({VOC}) challenge",
            "journal",
            "International Journal of Computer Vision",
            "2010",
            "everingham",
            volume="88",
            number="2",
            pages="303--338",
            doi="10.1007/s11263-009-0275-4",
        ),
        _paper(
            "zhang2018topdown",
            "article",
            [
                "Zhang, Jianming",
                "Bargal, Sarah Adel",
                "Lin, Zhe",
                "Brandt, Jonathan",
                "Shen, Xiaohui",
                "Sclaroff, Stan",
            ],
            "Top-down neural attention by excitation backprop",
            "journal",
            "International Journal of Computer Vision",
            "2018",
            "zhang",
            years=("2016", "2018"),
            volume="126",
            number="10",
            pages="1084--1102",
            doi="10.1007/s11263-017-1059-x",
            note="Conference version: ECCV 2016",
        ),
        _paper(
            "samek2017evaluating",
            "article",
            [
                "Samek, Wojciech",
                "Binder, Alexander",
                "Montavon, Gr{\\'e}goire",
                "Lapuschkin, Sebastian",
                'M{\\"u}ller, Klaus-Robert',
            ],
            "Evaluating the visualization of what a deep neural network has learned",
            "journal",
            "IEEE Transactions on Neural Networks and Learning Systems",
            "2017",
            "samek",
            volume="28",
            number="11",
            pages="2660--2673",
            doi="10.1109/TNNLS.2016.2599820",
        ),
        _paper(
            "hooker2019benchmark",
            "inproceedings",
            ["Hooker, Sara", "Erhan, Dumitru", "Kindermans, Pieter-Jan", "Kim, Been"],
            "A benchmark for interpretability methods in deep neural networks",
            "booktitle",
            "Advances in Neural Information Processing Systems 32 (NeurIPS)",
            "2019",
            "hooker",
        ),
        _paper(
            "adebayo2018sanity",
            "inproceedings",
            ["Adebayo, Julius", "Gilmer, Justin", "Muelly, Michael", "Goodfellow, Ian", "Hardt, Moritz", "Kim, Been"],
            "Sanity checks for saliency maps",
            "booktitle",
            "Advances in Neural Information Processing Systems 31 (NeurIPS)",
            "2018",
            "adebayo",
        ),
        _paper(
            "yeh2019infidelity",
            "inproceedings",
            ["Yeh, Chih-Kuan", "Hsieh, Cheng-Yu", "Suggala, Arun Sai", "Inouye, David I.", "Ravikumar, Pradeep"],
            "On the (in)fidelity and sensitivity of explanations",
            "booktitle",
            "Advances in Neural Information Processing Systems 32 (NeurIPS)",
            "2019",
            "yeh",
        ),
        _paper(
            "bhatt2020evaluating",
            "inproceedings",
            ["Bhatt, Umang", "Weller, Adrian", "Moura, Jos{\\'e} M. F."],
            "Evaluating and aggregating feature-based model explanations",
            "booktitle",
            "Proceedings of the Twenty-Ninth International Joint Conference on Artificial Intelligence (IJCAI)",
            "2020",
            "bhatt",
            pages="3016--3022",
            doi="10.24963/ijcai.2020/417",
        ),
        _paper(
            "chalasani2020concise",
            "inproceedings",
            ["Chalasani, Prasad", "Chen, Jiefeng", "Chowdhury, Amrita Roy", "Wu, Xi", "Jha, Somesh"],
            "Concise explanations of neural networks using adversarial training",
            "booktitle",
            "Proceedings of the 37th International Conference on Machine Learning (ICML)",
            "2020",
            "chalasani",
            series="Proceedings of Machine Learning Research",
            volume="119",
            pages="1383--1391",
        ),
        _paper(
            "wang2004image",
            "article",
            ["Wang, Zhou", "Bovik, Alan C.", "Sheikh, Hamid R.", "Simoncelli, Eero P."],
            "Image quality assessment: from error visibility to structural similarity",
            "journal",
            "IEEE Transactions on Image Processing",
            "2004",
            "wang",
            volume="13",
            number="4",
            pages="600--612",
            doi="10.1109/TIP.2003.819861",
        ),
        # Statistics
        _paper(
            "demsar2006statistical",
            "article",
            ["Dem{\\v{s}}ar, Janez"],
            "Statistical comparisons of classifiers over multiple data sets",
            "journal",
            "Journal of Machine Learning Research",
            "2006",
            "demsar",
            volume="7",
            pages="1--30",
        ),
        _paper(
            "benavoli2016should",
            "article",
            ["Benavoli, Alessio", "Corani, Giorgio", "Mangili, Francesca"],
            "Should we really use post-hoc tests based on mean-ranks?",
            "journal",
            "Journal of Machine Learning Research",
            "2016",
            "benavoli",
            volume="17",
            number="5",
            pages="1--10",
        ),
        _paper(
            "wilcoxon1945individual",
            "article",
            ["Wilcoxon, Frank"],
            "Individual comparisons by ranking methods",
            "journal",
            "Biometrics Bulletin",
            "1945",
            "wilcoxon",
            volume="1",
            number="6",
            pages="80--83",
            doi="10.2307/3001968",
        ),
        _paper(
            "holm1979simple",
            "article",
            ["Holm, Sture"],
            "A simple sequentially rejective multiple test procedure",
            "journal",
            "Scandinavian Journal of Statistics",
            "1979",
            "holm",
            volume="6",
            number="2",
            pages="65--70",
        ),
        _paper(
            "efron1993introduction",
            "book",
            ["Efron, Bradley", "Tibshirani, Robert J."],
            "An Introduction to the Bootstrap",
            "publisher",
            "Chapman and Hall/CRC",
            "1993",
            "efron",
            doi="10.1201/9780429246593",
        ),
        _paper(
            "shapley1953value",
            "incollection",
            ["Shapley, Lloyd S."],
            "A value for n-person games",
            "booktitle",
            "Contributions to the Theory of Games, Volume II",
            "1953",
            "shapley",
            series="Annals of Mathematics Studies",
            volume="28",
            pages="307--317",
            publisher="Princeton University Press",
        ),
        _paper(
            "strumbelj2014explaining",
            "article",
            ["{\\v{S}}trumbelj, Erik", "Kononenko, Igor"],
            "Explaining prediction models and individual predictions with feature contributions",
            "journal",
            "Knowledge and Information Systems",
            "2014",
            "strumbelj",
            volume="41",
            number="3",
            pages="647--665",
            doi="10.1007/s10115-013-0679-x",
        ),
        # Models
        _paper(
            "he2016deep",
            "inproceedings",
            ["He, Kaiming", "Zhang, Xiangyu", "Ren, Shaoqing", "Sun, Jian"],
            "Deep residual learning for image recognition",
            "booktitle",
            "IEEE Conference on Computer Vision and Pattern Recognition (CVPR)",
            "2016",
            "he",
            pages="770--778",
            doi="10.1109/CVPR.2016.90",
        ),
        _paper(
            "howard2017mobilenets",
            "misc",
            [
                "Howard, Andrew G.",
                "Zhu, Menglong",
                "Chen, Bo",
                "Kalenichenko, Dmitry",
                "Wang, Weijun",
                "Weyand, Tobias",
                "Andreetto, Marco",
                "Adam, Hartwig",
            ],
            "MobileNets: Efficient convolutional neural networks for mobile vision applications",
            "howpublished",
            "arXiv preprint arXiv:1704.04861",
            "2017",
            "howard",
            eprint="1704.04861",
            archiveprefix="arXiv",
            doi="10.48550/arXiv.1704.04861",
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
    header = "% refs.bib written by `xbench report`: the works cited in methods.md.\n\n"
    return header + "\n".join(CATALOGUE[k].render() for k in dict.fromkeys(keys) if k in CATALOGUE)
