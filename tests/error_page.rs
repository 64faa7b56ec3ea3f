//! The error page's links: back to the overview (which answers), and "this page with
//! default settings" only where that page exists and can be read without settings.

mod common;
use common::*;

fn links(body: &str) -> Vec<String> {
    let main = body
        .split("<main>")
        .nth(1)
        .and_then(|m| m.split("</main>").next())
        .unwrap_or_default();
    main.split("href=\"")
        .skip(1)
        .filter_map(|s| s.split('"').next())
        .map(str::to_string)
        .collect()
}

#[test]
fn the_error_pages_links_lead_somewhere() {
    let addr = start_server(&demo_dir());
    // Bad settings: back to the overview, or the same page with its defaults.
    let r = get(addr, "/balance?wave=99");
    assert_eq!(r.status, 404);
    assert_eq!(links(&r.body), ["/", "/balance"], "{}", r.body);
    for link in links(&r.body) {
        assert_eq!(get(addr, &link).status, 200, "{link}");
    }
    // A page that does not exist: only the overview, never the missing page again.
    let r = get(addr, "/no/such/page");
    assert_eq!(r.status, 404);
    assert_eq!(links(&r.body), ["/"], "{}", r.body);
    // A form's post that fails: no link to GET the form's address.
    let origin = format!("http://{addr}");
    let r = post_form(addr, &origin, "/projects/map", b"name=x");
    assert!(r.status >= 400, "{}", r.status);
    assert_eq!(links(&r.body), ["/"], "{}", r.body);
}
