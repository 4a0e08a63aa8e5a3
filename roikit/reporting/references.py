"""The works the methods text may cite: in-text form, APA 7th edition reference entry and BibTeX.

Only the works a text actually cites are listed (:class:`Citations` records them as the text is written).
Entries are written from the publications themselves as commonly cited (authors, year, title, journal, volume,
pages, DOI); checked against the publishers' pages from memory, no library lookup (noted as such).

Examples
--------
>>> c = Citations()
>>> c.cite("holm1979")
'Holm, 1979'
>>> [key for key in c.keys]
['holm1979']
"""

from __future__ import annotations

from dataclasses import dataclass, field

from .. import __version__

__all__ = ["REFERENCES", "Citations", "reference_list", "bibtex"]


@dataclass(frozen=True)
class Reference:
    key: str
    in_text: str  # "Holm, 1979" (markup)
    entry: str  # APA 7th reference entry (markup: *italic*)
    bibtex: str


def _r(key, in_text, entry, bib):
    return Reference(key, in_text, entry, bib.strip())


REFERENCES: dict[str, Reference] = {r.key: r for r in [
    _r("holm1979", "Holm, 1979",
       "Holm, S. (1979). A simple sequentially rejective multiple test procedure. *Scandinavian Journal of "
       "Statistics, 6*(2), 65–70.",
       """@article{holm1979,
  author = {Holm, Sture},
  title = {A simple sequentially rejective multiple test procedure},
  journal = {Scandinavian Journal of Statistics},
  volume = {6}, number = {2}, pages = {65--70}, year = {1979}
}"""),
    _r("benjamini1995", "Benjamini & Hochberg, 1995",
       "Benjamini, Y., & Hochberg, Y. (1995). Controlling the false discovery rate: A practical and powerful "
       "approach to multiple testing. *Journal of the Royal Statistical Society: Series B (Methodological), 57*(1), "
       "289–300. https://doi.org/10.1111/j.2517-6161.1995.tb02031.x",
       """@article{benjamini1995,
  author = {Benjamini, Yoav and Hochberg, Yosef},
  title = {Controlling the false discovery rate: A practical and powerful approach to multiple testing},
  journal = {Journal of the Royal Statistical Society: Series B (Methodological)},
  volume = {57}, number = {1}, pages = {289--300}, year = {1995},
  doi = {10.1111/j.2517-6161.1995.tb02031.x}
}"""),
    _r("dunn1961", "Dunn, 1961",
       "Dunn, O. J. (1961). Multiple comparisons among means. *Journal of the American Statistical Association, "
       "56*(293), 52–64. https://doi.org/10.1080/01621459.1961.10482090",
       """@article{dunn1961,
  author = {Dunn, Olive Jean},
  title = {Multiple comparisons among means},
  journal = {Journal of the American Statistical Association},
  volume = {56}, number = {293}, pages = {52--64}, year = {1961},
  doi = {10.1080/01621459.1961.10482090}
}"""),
    _r("westfall1993", "Westfall & Young, 1993",
       "Westfall, P. H., & Young, S. S. (1993). *Resampling-based multiple testing: Examples and methods for "
       "p-value adjustment*. Wiley.",
       """@book{westfall1993,
  author = {Westfall, Peter H. and Young, S. Stanley},
  title = {Resampling-Based Multiple Testing: Examples and Methods for p-Value Adjustment},
  publisher = {Wiley}, address = {New York}, year = {1993}
}"""),
    _r("westfall2014", "Westfall, Kenny & Judd, 2014",
       "Westfall, J., Kenny, D. A., & Judd, C. M. (2014). Statistical power and optimal design in experiments in "
       "which samples of participants respond to samples of stimuli. *Journal of Experimental Psychology: General, "
       "143*(5), 2020–2045. https://doi.org/10.1037/xge0000014",
       """@article{westfall2014,
  author = {Westfall, Jacob and Kenny, David A. and Judd, Charles M.},
  title = {Statistical power and optimal design in experiments in which samples of participants respond to samples
           of stimuli},
  journal = {Journal of Experimental Psychology: General},
  volume = {143}, number = {5}, pages = {2020--2045}, year = {2014},
  doi = {10.1037/xge0000014}
}"""),
    _r("satterthwaite1946", "Satterthwaite, 1946",
       "Satterthwaite, F. E. (1946). An approximate distribution of estimates of variance components. "
       "*Biometrics Bulletin, 2*(6), 110–114. https://doi.org/10.2307/3002019",
       """@article{satterthwaite1946,
  author = {Satterthwaite, F. E.},
  title = {An approximate distribution of estimates of variance components},
  journal = {Biometrics Bulletin},
  volume = {2}, number = {6}, pages = {110--114}, year = {1946},
  doi = {10.2307/3002019}
}"""),
    _r("welch1947", "Welch, 1947",
       "Welch, B. L. (1947). The generalization of \"Student's\" problem when several different population "
       "variances are involved. *Biometrika, 34*(1–2), 28–35. https://doi.org/10.1093/biomet/34.1-2.28",
       """@article{welch1947,
  author = {Welch, B. L.},
  title = {The generalization of ``{Student's}'' problem when several different population variances are involved},
  journal = {Biometrika},
  volume = {34}, number = {1-2}, pages = {28--35}, year = {1947},
  doi = {10.1093/biomet/34.1-2.28}
}"""),
    _r("brown1974", "Brown & Forsythe, 1974",
       "Brown, M. B., & Forsythe, A. B. (1974). Robust tests for the equality of variances. *Journal of the "
       "American Statistical Association, 69*(346), 364–367. https://doi.org/10.1080/01621459.1974.10482955",
       """@article{brown1974,
  author = {Brown, Morton B. and Forsythe, Alan B.},
  title = {Robust tests for the equality of variances},
  journal = {Journal of the American Statistical Association},
  volume = {69}, number = {346}, pages = {364--367}, year = {1974},
  doi = {10.1080/01621459.1974.10482955}
}"""),
    _r("knapp2003", "Knapp & Hartung, 2003",
       "Knapp, G., & Hartung, J. (2003). Improved tests for a random effects meta-regression with a single "
       "covariate. *Statistics in Medicine, 22*(17), 2693–2710. https://doi.org/10.1002/sim.1482",
       """@article{knapp2003,
  author = {Knapp, Guido and Hartung, Joachim},
  title = {Improved tests for a random effects meta-regression with a single covariate},
  journal = {Statistics in Medicine},
  volume = {22}, number = {17}, pages = {2693--2710}, year = {2003},
  doi = {10.1002/sim.1482}
}"""),
    _r("viechtbauer2005", "Viechtbauer, 2005",
       "Viechtbauer, W. (2005). Bias and efficiency of meta-analytic variance estimators in the random-effects "
       "model. *Journal of Educational and Behavioral Statistics, 30*(3), 261–293. "
       "https://doi.org/10.3102/10769986030003261",
       """@article{viechtbauer2005,
  author = {Viechtbauer, Wolfgang},
  title = {Bias and efficiency of meta-analytic variance estimators in the random-effects model},
  journal = {Journal of Educational and Behavioral Statistics},
  volume = {30}, number = {3}, pages = {261--293}, year = {2005},
  doi = {10.3102/10769986030003261}
}"""),
    _r("dersimonian1986", "DerSimonian & Laird, 1986",
       "DerSimonian, R., & Laird, N. (1986). Meta-analysis in clinical trials. *Controlled Clinical Trials, 7*(3), "
       "177–188. https://doi.org/10.1016/0197-2456(86)90046-2",
       """@article{dersimonian1986,
  author = {DerSimonian, Rebecca and Laird, Nan},
  title = {Meta-analysis in clinical trials},
  journal = {Controlled Clinical Trials},
  volume = {7}, number = {3}, pages = {177--188}, year = {1986},
  doi = {10.1016/0197-2456(86)90046-2}
}"""),
    _r("paule1982", "Paule & Mandel, 1982",
       "Paule, R. C., & Mandel, J. (1982). Consensus values and weighting factors. *Journal of Research of the "
       "National Bureau of Standards, 87*(5), 377–385. https://doi.org/10.6028/jres.087.022",
       """@article{paule1982,
  author = {Paule, Robert C. and Mandel, John},
  title = {Consensus values and weighting factors},
  journal = {Journal of Research of the National Bureau of Standards},
  volume = {87}, number = {5}, pages = {377--385}, year = {1982},
  doi = {10.6028/jres.087.022}
}"""),
    _r("hedges1981", "Hedges, 1981",
       "Hedges, L. V. (1981). Distribution theory for Glass's estimator of effect size and related estimators. "
       "*Journal of Educational Statistics, 6*(2), 107–128. https://doi.org/10.3102/10769986006002107",
       """@article{hedges1981,
  author = {Hedges, Larry V.},
  title = {Distribution theory for {Glass's} estimator of effect size and related estimators},
  journal = {Journal of Educational Statistics},
  volume = {6}, number = {2}, pages = {107--128}, year = {1981},
  doi = {10.3102/10769986006002107}
}"""),
    _r("steiger1997", "Steiger & Fouladi, 1997",
       "Steiger, J. H., & Fouladi, R. T. (1997). Noncentrality interval estimation and the evaluation of "
       "statistical models. In L. L. Harlow, S. A. Mulaik, & J. H. Steiger (Eds.), *What if there were no "
       "significance tests?* (pp. 221–257). Lawrence Erlbaum Associates.",
       """@incollection{steiger1997,
  author = {Steiger, James H. and Fouladi, Rachel T.},
  title = {Noncentrality interval estimation and the evaluation of statistical models},
  booktitle = {What If There Were No Significance Tests?},
  editor = {Harlow, Lisa L. and Mulaik, Stanley A. and Steiger, James H.},
  pages = {221--257}, publisher = {Lawrence Erlbaum Associates}, address = {Mahwah, NJ}, year = {1997}
}"""),
    _r("greenhouse1959", "Greenhouse & Geisser, 1959",
       "Greenhouse, S. W., & Geisser, S. (1959). On methods in the analysis of profile data. *Psychometrika, "
       "24*(2), 95–112. https://doi.org/10.1007/BF02289823",
       """@article{greenhouse1959,
  author = {Greenhouse, Samuel W. and Geisser, Seymour},
  title = {On methods in the analysis of profile data},
  journal = {Psychometrika},
  volume = {24}, number = {2}, pages = {95--112}, year = {1959},
  doi = {10.1007/BF02289823}
}"""),
    _r("huynh1976", "Huynh & Feldt, 1976",
       "Huynh, H., & Feldt, L. S. (1976). Estimation of the Box correction for degrees of freedom from sample "
       "data in randomized block and split-plot designs. *Journal of Educational Statistics, 1*(1), 69–82. "
       "https://doi.org/10.3102/10769986001001069",
       """@article{huynh1976,
  author = {Huynh, Huynh and Feldt, Leonard S.},
  title = {Estimation of the {Box} correction for degrees of freedom from sample data in randomized block and
           split-plot designs},
  journal = {Journal of Educational Statistics},
  volume = {1}, number = {1}, pages = {69--82}, year = {1976},
  doi = {10.3102/10769986001001069}
}"""),
    _r("mauchly1940", "Mauchly, 1940",
       "Mauchly, J. W. (1940). Significance test for sphericity of a normal *n*-variate distribution. *The Annals "
       "of Mathematical Statistics, 11*(2), 204–209. https://doi.org/10.1214/aoms/1177731915",
       """@article{mauchly1940,
  author = {Mauchly, John W.},
  title = {Significance test for sphericity of a normal n-variate distribution},
  journal = {The Annals of Mathematical Statistics},
  volume = {11}, number = {2}, pages = {204--209}, year = {1940},
  doi = {10.1214/aoms/1177731915}
}"""),
    _r("olejnik2003", "Olejnik & Algina, 2003",
       "Olejnik, S., & Algina, J. (2003). Generalized eta and omega squared statistics: Measures of effect size "
       "for some common research designs. *Psychological Methods, 8*(4), 434–447. "
       "https://doi.org/10.1037/1082-989X.8.4.434",
       """@article{olejnik2003,
  author = {Olejnik, Stephen and Algina, James},
  title = {Generalized eta and omega squared statistics: Measures of effect size for some common research designs},
  journal = {Psychological Methods},
  volume = {8}, number = {4}, pages = {434--447}, year = {2003},
  doi = {10.1037/1082-989X.8.4.434}
}"""),
    _r("rouder2009", "Rouder et al., 2009",
       "Rouder, J. N., Speckman, P. L., Sun, D., Morey, R. D., & Iverson, G. (2009). Bayesian *t* tests for "
       "accepting and rejecting the null hypothesis. *Psychonomic Bulletin & Review, 16*(2), 225–237. "
       "https://doi.org/10.3758/PBR.16.2.225",
       """@article{rouder2009,
  author = {Rouder, Jeffrey N. and Speckman, Paul L. and Sun, Dongchu and Morey, Richard D. and Iverson, Geoffrey},
  title = {Bayesian t tests for accepting and rejecting the null hypothesis},
  journal = {Psychonomic Bulletin \\& Review},
  volume = {16}, number = {2}, pages = {225--237}, year = {2009},
  doi = {10.3758/PBR.16.2.225}
}"""),
    _r("schuirmann1987", "Schuirmann, 1987",
       "Schuirmann, D. J. (1987). A comparison of the two one-sided tests procedure and the power approach for "
       "assessing the equivalence of average bioavailability. *Journal of Pharmacokinetics and "
       "Biopharmaceutics, 15*(6), 657–680. https://doi.org/10.1007/BF01068419",
       """@article{schuirmann1987,
  author = {Schuirmann, Donald J.},
  title = {A comparison of the two one-sided tests procedure and the power approach for assessing the equivalence
           of average bioavailability},
  journal = {Journal of Pharmacokinetics and Biopharmaceutics},
  volume = {15}, number = {6}, pages = {657--680}, year = {1987},
  doi = {10.1007/BF01068419}
}"""),
    _r("lakens2017", "Lakens, 2017",
       "Lakens, D. (2017). Equivalence tests: A practical primer for *t* tests, correlations, and meta-analyses. "
       "*Social Psychological and Personality Science, 8*(4), 355–362. https://doi.org/10.1177/1948550617697177",
       """@article{lakens2017,
  author = {Lakens, Dani{\\"e}l},
  title = {Equivalence tests: A practical primer for t tests, correlations, and meta-analyses},
  journal = {Social Psychological and Personality Science},
  volume = {8}, number = {4}, pages = {355--362}, year = {2017},
  doi = {10.1177/1948550617697177}
}"""),
    _r("jeffreys1961", "Jeffreys, 1961",
       "Jeffreys, H. (1961). *Theory of probability* (3rd ed.). Oxford University Press.",
       """@book{jeffreys1961,
  author = {Jeffreys, Harold},
  title = {Theory of Probability},
  edition = {3}, publisher = {Oxford University Press}, address = {Oxford}, year = {1961}
}"""),
    _r("lee2013", "Lee & Wagenmakers, 2013",
       "Lee, M. D., & Wagenmakers, E.-J. (2013). *Bayesian cognitive modeling: A practical course*. Cambridge "
       "University Press. https://doi.org/10.1017/CBO9781139087759",
       """@book{lee2013,
  author = {Lee, Michael D. and Wagenmakers, Eric-Jan},
  title = {Bayesian Cognitive Modeling: A Practical Course},
  publisher = {Cambridge University Press}, address = {Cambridge}, year = {2013},
  doi = {10.1017/CBO9781139087759}
}"""),
    _r("gelman2006", "Gelman & Stern, 2006",
       "Gelman, A., & Stern, H. (2006). The difference between “significant” and “not significant” is not itself "
       "statistically significant. *The American Statistician, 60*(4), 328–331. "
       "https://doi.org/10.1198/000313006X152649",
       """@article{gelman2006,
  author = {Gelman, Andrew and Stern, Hal},
  title = {The difference between ``significant'' and ``not significant'' is not itself statistically significant},
  journal = {The American Statistician},
  volume = {60}, number = {4}, pages = {328--331}, year = {2006},
  doi = {10.1198/000313006X152649}
}"""),
    _r("nieuwenhuis2011", "Nieuwenhuis et al., 2011",
       "Nieuwenhuis, S., Forstmann, B. U., & Wagenmakers, E.-J. (2011). Erroneous analyses of interactions in "
       "neuroscience: A problem of significance. *Nature Neuroscience, 14*(9), 1105–1107. "
       "https://doi.org/10.1038/nn.2886",
       """@article{nieuwenhuis2011,
  author = {Nieuwenhuis, Sander and Forstmann, Birte U. and Wagenmakers, Eric-Jan},
  title = {Erroneous analyses of interactions in neuroscience: A problem of significance},
  journal = {Nature Neuroscience},
  volume = {14}, number = {9}, pages = {1105--1107}, year = {2011},
  doi = {10.1038/nn.2886}
}"""),
    _r("iglewicz1993", "Iglewicz & Hoaglin, 1993",
       "Iglewicz, B., & Hoaglin, D. C. (1993). *How to detect and handle outliers*. ASQC Quality Press.",
       """@book{iglewicz1993,
  author = {Iglewicz, Boris and Hoaglin, David C.},
  title = {How to Detect and Handle Outliers},
  publisher = {ASQC Quality Press}, address = {Milwaukee, WI}, year = {1993}
}"""),
    _r("kriegeskorte2009", "Kriegeskorte et al., 2009",
       "Kriegeskorte, N., Simmons, W. K., Bellgowan, P. S. F., & Baker, C. I. (2009). Circular analysis in systems "
       "neuroscience: The dangers of double dipping. *Nature Neuroscience, 12*(5), 535–540. "
       "https://doi.org/10.1038/nn.2303",
       """@article{kriegeskorte2009,
  author = {Kriegeskorte, Nikolaus and Simmons, W. Kyle and Bellgowan, Patrick S. F. and Baker, Chris I.},
  title = {Circular analysis in systems neuroscience: The dangers of double dipping},
  journal = {Nature Neuroscience},
  volume = {12}, number = {5}, pages = {535--540}, year = {2009},
  doi = {10.1038/nn.2303}
}"""),
    _r("roikit", "roikit developers, 2026",
       f"roikit developers. (2026). *roikit: Region-of-interest group analysis of first-level contrast maps* "
       f"(Version {__version__}) [Computer software].",
       f"""@software{{roikit,
  author = {{{{roikit developers}}}},
  title = {{roikit: Region-of-interest group analysis of first-level contrast maps}},
  version = {{{__version__}}}, year = {{2026}}, license = {{BSD-3-Clause}}
}}"""),
]}


@dataclass
class Citations:
    """Records the works a text cites, in order of first citation."""

    keys: list[str] = field(default_factory=list)

    def cite(self, *keys: str) -> str:
        """The in-text citation (``Holm, 1979``; several joined by ``; ``) and record them."""
        out = []
        for key in keys:
            if key not in REFERENCES:
                raise KeyError(key)
            if key not in self.keys:
                self.keys.append(key)
            out.append(REFERENCES[key].in_text)
        return "; ".join(out)

    def year(self, key: str) -> str:
        """``Holm (1979)`` style: the author part and the year in parentheses (narrative citation)."""
        self.cite(key)
        author, year = REFERENCES[key].in_text.rsplit(", ", 1)
        return f"{author} ({year})"


def reference_list(keys) -> list[str]:
    """APA reference entries (markup) of ``keys``, sorted by first author as APA orders them."""
    entries = [REFERENCES[k].entry for k in dict.fromkeys(keys)]
    return sorted(entries, key=lambda e: e.lower())


def bibtex(keys) -> str:
    """The BibTeX entries of ``keys``."""
    return "\n\n".join(REFERENCES[k].bibtex for k in dict.fromkeys(keys)) + "\n"
