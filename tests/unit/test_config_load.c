/* The configuration loader: the documented example parses, environment
 * overrides win, relative paths follow the file, and every kind of mistake
 * is refused with a message naming the line or variable. */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "likeness/config.h"
#include "likeness/store.h"
#include "lk_test.h"

static char dir[] = "/tmp/lk-config-XXXXXX";

static const char *write_ini(const char *name, const char *text)
{
    static char path[256];
    snprintf(path, sizeof path, "%s/%s", dir, name);
    FILE *f = fopen(path, "w");
    if (!f)
        LK_SKIP("cannot write %s", path);
    fputs(text, f);
    fclose(f);
    return path;
}

static void expect_error(const char *what, const char *text, const char *needle)
{
    lk_config c;
    lk_error e;
    lk_code rc = lk_config_load(&c, write_ini("bad.ini", text), &e);
    CHECK(rc == LK_ERR_CONFIG, "%s: refused with config_error (got %s)", what, lk_code_name(rc));
    CHECK(rc != LK_OK && strstr(e.message, needle), "%s: message '%s' mentions '%s'", what,
          e.message, needle);
}

int main(void)
{
    if (!mkdtemp(dir))
        LK_SKIP("cannot make a temporary directory");
    const char *src = getenv("LIKENESS_SOURCE");
    char example[1024];
    snprintf(example, sizeof example, "%s/deploy/likenessd.ini.example", src ? src : ".");
    lk_config c;
    lk_error e;
    /* The shipped example is a valid configuration as it stands. */
    lk_code rc = lk_config_load(&c, example, &e);
    CHECK(rc == LK_OK, "deploy/likenessd.ini.example loads: %s", rc ? e.message : "ok");
    CHECK(c.port == 8443 && c.max_body_bytes == 16u << 20 && c.queue_depth == 64,
          "example values: port %d, body %llu, queue %d", c.port,
          (unsigned long long)c.max_body_bytes, c.queue_depth);
    CHECK(!strcmp(c.store_url, "sqlite:/var/lib/likeness/store.db"), "store url %s", c.store_url);
    CHECK(!strcmp(c.tls_priorities, LK_CONFIG_TLS_PRIORITIES), "'default' priorities expand");

    const char *p = write_ini("a.ini", "; comment\n[server]\nport = 9443\ncert_file = tls/s.crt\n"
                                       "[store]\nurl = sqlite:x.db\n[keys]\nfile = keys\n"
                                       "[client:desk-1]\nsubject = CN=desk-1,O=Example\n"
                                       "scopes = verify, enrol\n[server]\nclient_ca_file = /etc/ca.pem\n");
    rc = lk_config_load(&c, p, &e);
    CHECK(rc == LK_OK, "small file loads: %s", rc ? e.message : "ok");
    char want[512];
    snprintf(want, sizeof want, "%s/tls/s.crt", dir);
    CHECK(!strcmp(c.cert_file, want), "relative path resolved against the file: %s", c.cert_file);
    CHECK(!strcmp(c.client_ca_file, "/etc/ca.pem"), "absolute path kept: %s", c.client_ca_file);
    CHECK(c.n_clients == 1 && c.clients[0].scopes == (LK_SCOPE_VERIFY | LK_SCOPE_ENROL) &&
              !strcmp(c.clients[0].subject, "CN=desk-1,O=Example"),
          "client section: %zu clients", c.n_clients);

    setenv("LIKENESS_SERVER_PORT", "10443", 1);
    setenv("LIKENESS_LIMITS_BURST", "7", 1);
    rc = lk_config_load(&c, p, &e);
    CHECK(rc == LK_OK && c.port == 10443 && c.burst == 7, "environment overrides the file: %d %g",
          c.port, c.burst);
    setenv("LIKENESS_SERVER_PORT", "70000", 1);
    rc = lk_config_load(&c, p, &e);
    CHECK(rc == LK_ERR_CONFIG && strstr(e.message, "LIKENESS_SERVER_PORT"),
          "a bad override names its variable: %s", e.message);
    unsetenv("LIKENESS_SERVER_PORT");
    unsetenv("LIKENESS_LIMITS_BURST");

    char *ini = lk_config_to_ini(&c);
    CHECK(ini && strstr(ini, "[client:desk-1]") && strstr(ini, "port = 9443"),
          "effective configuration printed");
    /* The printed configuration reads back to the same values. */
    if (ini) {
        lk_config c2;
        rc = lk_config_load(&c2, write_ini("round.ini", ini), &e);
        CHECK(rc == LK_OK && c2.port == c.port && !strcmp(c2.cert_file, c.cert_file) &&
                  c2.n_clients == 1 && c2.rate_per_second == c.rate_per_second,
              "printed configuration loads back the same: %s", rc ? e.message : "ok");
        free(ini);
    }

    const char *base = "[store]\nurl = sqlite:x\n[keys]\nfile = k\n";
    char buf[512];
    snprintf(buf, sizeof buf, "%s[server]\nprot = 1\n", base);
    expect_error("unknown key", buf, "prot");
    snprintf(buf, sizeof buf, "%s[server]\nport = eighty\n", base);
    expect_error("non-number", buf, "port");
    snprintf(buf, sizeof buf, "%s[server]\nport = 0\n", base);
    expect_error("out of range", buf, "between 1 and 65535");
    snprintf(buf, sizeof buf, "%s[server]\nworkers = 2.5\n", base);
    expect_error("fraction for an integer", buf, "integer");
    snprintf(buf, sizeof buf, "%s[model]\ntarget_fmr = 1.5\n", base);
    expect_error("FMR out of range", buf, "target_fmr");
    snprintf(buf, sizeof buf, "%sthis line is not ini\n", base);
    expect_error("syntax error", buf, "line 5");
    expect_error("missing store", "[keys]\nfile = k\n", "[store] url");
    expect_error("missing key file", "[store]\nurl = sqlite:x\n", "[keys] file");
    snprintf(buf, sizeof buf, "%s[client:x]\nsubject = CN=x\nscopes = verify,fly\n", base);
    expect_error("unknown scope", buf, "fly");
    snprintf(buf, sizeof buf, "%s[client:x]\nsubject = CN=x\nscopes = verify\n", base);
    expect_error("client without a CA", buf, "client_ca_file");
    snprintf(buf, sizeof buf, "%s[server]\nlisten = 127.0.0.1\n  0.0.0.0 ; why\n", base);
    expect_error("continuation line", buf, "indented");
    snprintf(buf, sizeof buf, "%s[server]\nlisten =; 127.0.0.1\n", base);
    expect_error("';' in a value", buf, "';'");
    char longline[400];
    snprintf(longline, sizeof longline, "%s[server]\nlisten = %0250d\n", base, 1);
    expect_error("line over libinih's limit", longline, "longer than 198");
    rc = lk_config_load(&c, "/nonexistent/likenessd.ini", &e);
    CHECK(rc == LK_ERR_CONFIG && strstr(e.message, "/nonexistent/likenessd.ini"),
          "missing file named: %s", e.message);
    return lk_test_done();
}
