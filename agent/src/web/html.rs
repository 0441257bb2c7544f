//! Escaped HTML as a type, so that a text the page forgets to escape is a
//! compile error rather than a review finding.
//!
//! [`Html`] is markup that is safe to put in a page. There are two ways to
//! make one: [`Html::text`], which escapes a text, and [`markup!`], which
//! fills a template written as a string literal in our source (the markup
//! is ours) with arguments that each go through [`Render`]: a `&str` or a
//! `String` is escaped, an `Html` is passed through as it is, a number is
//! written as `format!` would write it. `Html` values join with
//! [`Html::push`], `collect` and `extend`. Nothing turns a `String` into
//! `Html` without escaping it.
//!
//! `markup!` takes named arguments only and, unlike `format!`, cannot
//! capture a variable from the surrounding scope (`{tank}` with no
//! `tank = ...` does not compile), so every value in a template is one that
//! went through `Render`.
//!
//! Left out: checking that templates are well-formed HTML, attribute
//! contexts that need more than quoting (URLs, `style`, event handlers: the
//! page puts data in none of them), and `html!`-style markup macros.

use std::fmt::{self, Write as _};

/// Markup safe to put in a page: escaped text, our own templates, and
/// joins of those.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Html(String);

impl Html {
    /// Nothing.
    pub fn new() -> Self {
        Self::default()
    }

    /// A text as HTML, safe in element content and in quoted attribute
    /// values: `&`, `<`, `>`, `"` and `'` become character references, and
    /// control characters (but tab, line feed and carriage return, which
    /// HTML takes as white space) are shown as `\u{..}`, as the log shows
    /// them: a character reference would not do, since HTML maps those of
    /// U+0080 to U+009F to other characters.
    pub fn text(text: &str) -> Self {
        let mut out = String::with_capacity(text.len());
        // Writing to a String cannot fail.
        let _ = escape_into(&mut out, text);
        Self(out)
    }

    /// Appends more markup.
    pub fn push(&mut self, more: Html) {
        self.0.push_str(&more.0);
    }

    pub fn as_str(&self) -> &str {
        &self.0
    }

    pub fn into_string(self) -> String {
        self.0
    }

    /// A template filled by [`markup!`]. Only `markup!` calls this: the
    /// arguments it passes have gone through [`Render`].
    #[doc(hidden)]
    pub fn __from_template(filled: fmt::Arguments<'_>) -> Self {
        Self(fmt::format(filled))
    }

    /// As [`Html::__from_template`], appended to `self`.
    #[doc(hidden)]
    pub fn __push_template(&mut self, filled: fmt::Arguments<'_>) {
        // Writing to a String cannot fail.
        let _ = self.0.write_fmt(filled);
    }
}

impl FromIterator<Html> for Html {
    fn from_iter<I: IntoIterator<Item = Html>>(parts: I) -> Self {
        let mut out = Html::new();
        out.extend(parts);
        out
    }
}

impl Extend<Html> for Html {
    fn extend<I: IntoIterator<Item = Html>>(&mut self, parts: I) {
        for part in parts {
            self.push(part);
        }
    }
}

/// What a [`markup!`] template may hold: texts (escaped), markup (as it
/// is) and numbers (whose digits, signs, points, `inf` and `NaN` need no
/// escaping; a format spec such as `{level:.3}` applies to them).
pub trait Render {
    fn render(&self, out: &mut fmt::Formatter<'_>) -> fmt::Result;
}

impl Render for str {
    fn render(&self, out: &mut fmt::Formatter<'_>) -> fmt::Result {
        escape_into(out, self)
    }
}

impl Render for String {
    fn render(&self, out: &mut fmt::Formatter<'_>) -> fmt::Result {
        escape_into(out, self)
    }
}

impl Render for Html {
    fn render(&self, out: &mut fmt::Formatter<'_>) -> fmt::Result {
        out.write_str(&self.0)
    }
}

impl<T: Render + ?Sized> Render for &T {
    fn render(&self, out: &mut fmt::Formatter<'_>) -> fmt::Result {
        (**self).render(out)
    }
}

macro_rules! numbers {
    ($($t:ty),*) => {$(
        impl Render for $t {
            fn render(&self, out: &mut fmt::Formatter<'_>) -> fmt::Result {
                fmt::Display::fmt(self, out)
            }
        }
    )*};
}

numbers!(i32, i64, u32, u64, usize, f64);

/// One argument of a [`markup!`] template, written through [`Render`].
#[doc(hidden)]
pub struct Arg<'a, T: ?Sized>(pub &'a T);

impl<T: Render + ?Sized> fmt::Display for Arg<'_, T> {
    fn fmt(&self, out: &mut fmt::Formatter<'_>) -> fmt::Result {
        self.0.render(out)
    }
}

/// Fills a template of our markup, `format!`-like, into an [`Html`]:
/// `markup!("<td data-event=\"{id}\">{tank}</td>", id = e.event, tank = e.tank)`.
/// Every argument goes through [`Render`]: text is escaped, `Html` is not
/// escaped again. `markup!(&mut out, "...", ...)` appends to the `Html`
/// `out` instead of making a new one.
///
/// The template must be a string literal, and its arguments named; a
/// `{name}` with no `name = ...` does not compile (no implicit capture, as
/// the template reaches `format_args!` through `concat!`).
macro_rules! markup {
    (&mut $out:expr, $template:literal $(, $name:ident = $value:expr)* $(,)?) => {
        $crate::web::html::Html::__push_template(
            &mut $out,
            ::std::format_args!(
                ::std::concat!($template)
                $(, $name = $crate::web::html::Arg(&$value))*
            ),
        )
    };
    ($template:literal $(, $name:ident = $value:expr)* $(,)?) => {
        $crate::web::html::Html::__from_template(::std::format_args!(
            ::std::concat!($template)
            $(, $name = $crate::web::html::Arg(&$value))*
        ))
    };
}

pub(crate) use markup;

/// Writes `text` escaped for HTML (see [`Html::text`]).
fn escape_into(out: &mut impl fmt::Write, text: &str) -> fmt::Result {
    let mut plain = 0;
    for (i, c) in text.char_indices() {
        let reference = match c {
            '&' => "&amp;",
            '<' => "&lt;",
            '>' => "&gt;",
            '"' => "&quot;",
            '\'' => "&#39;",
            '\t' | '\n' | '\r' => continue,
            c if c.is_control() => "",
            _ => continue,
        };
        out.write_str(&text[plain..i])?;
        if reference.is_empty() {
            write!(out, "\\u{{{:x}}}", u32::from(c))?;
        } else {
            out.write_str(reference)?;
        }
        plain = i + c.len_utf8();
    }
    out.write_str(&text[plain..])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn text_escapes_markup_and_both_quotes() {
        assert_eq!(
            Html::text(r#"<img src=x onerror="alert('1')">&"#).as_str(),
            "&lt;img src=x onerror=&quot;alert(&#39;1&#39;)&quot;&gt;&amp;"
        );
        assert_eq!(
            Html::text("FF-T12 · ü – 5 m³").as_str(),
            "FF-T12 · ü – 5 m³"
        );
        assert_eq!(Html::text("").as_str(), "");
    }

    #[test]
    fn control_characters_are_shown_and_white_space_kept() {
        assert_eq!(
            Html::text("a\0b\u{7}c\u{1b}[31md\u{7f}e\u{85}f\u{9f}").as_str(),
            r"a\u{0}b\u{7}c\u{1b}[31md\u{7f}e\u{85}f\u{9f}"
        );
        assert_eq!(
            Html::text("one\ttwo\r\nthree").as_str(),
            "one\ttwo\r\nthree"
        );
        // Not controls: left as they are.
        assert_eq!(Html::text("\u{a0}\u{200b}").as_str(), "\u{a0}\u{200b}");
    }

    #[test]
    fn markup_escapes_texts_and_passes_html_through() {
        let tank = "T<1>&\"x\"";
        let owned = String::from("it's");
        let inner = markup!("<b>{t}</b>", t = tank);
        let page = markup!(
            r#"<p data-tank="{tank}" title="{owned}">{inner} {n} {x:.2}</p>"#,
            tank = tank,
            owned = owned,
            inner = inner,
            n = -42i64,
            x = 2.0f64 / 3.0,
        );
        assert_eq!(
            page.as_str(),
            "<p data-tank=\"T&lt;1&gt;&amp;&quot;x&quot;\" title=\"it&#39;s\">\
             <b>T&lt;1&gt;&amp;&quot;x&quot;</b> -42 0.67</p>"
        );
    }

    #[test]
    fn html_is_never_escaped_twice() {
        let once = Html::text("a & b");
        let again = markup!("{x}", x = once.clone());
        assert_eq!(again, once);
        let nested = markup!("{x}", x = markup!("{y}", y = markup!("{z}", z = "<&>")));
        assert_eq!(nested.as_str(), "&lt;&amp;&gt;");
        let by_reference = markup!("{x}", x = &once);
        assert_eq!(by_reference.as_str(), "a &amp; b");
    }

    #[test]
    fn parts_join_and_append() {
        let mut all: Html = ["<", "&"].into_iter().map(Html::text).collect();
        all.push(markup!("<br>"));
        markup!(&mut all, "<i>{t}</i>", t = "'");
        all.extend([Html::text(">")]);
        assert_eq!(all.as_str(), "&lt;&amp;<br><i>&#39;</i>&gt;");
        assert_eq!(Html::new().into_string(), "");
    }

    #[test]
    fn a_template_without_arguments_is_itself() {
        assert_eq!(markup!("<ul>\n").as_str(), "<ul>\n");
        assert_eq!(markup!("{{}}").as_str(), "{}");
    }
}
