/* likeness: offline verification, training, calibration and evaluation. */
#include <stdio.h>
#include <string.h>

#include "cli.h"

static const cli_command commands[] = {
    {"detect", "find faces, eyes and quality in images; JSON per image, optional overlay",
     cmd_detect},
    {"features", "write the feature vector of the primary face of an image", cmd_features},
    {"verify", "compare a probe image with a reference image offline (same JSON as the service)",
     cmd_verify},
    {"train", "train a model (SVM, Platt calibration, operating points) from a data set",
     cmd_train},
    {"evaluate", "score pairs with a model: JSON measures and an HTML report with ROC/DET curves",
     cmd_evaluate},
    {"lfw", "run the LFW View 2 ten-fold protocol end to end and report accuracy", cmd_lfw},
    {"keys", "create and rotate master keys; create, list and revoke API keys", cmd_keys},
    {"audit", "verify the audit chain, or export it as JSON Lines", cmd_audit},
};

static void usage(FILE *f)
{
    fprintf(f, "usage: likeness COMMAND [OPTIONS]\n\n"
               "One-to-one face verification: offline tools of the likeness service.\n\n"
               "commands:\n");
    for (size_t i = 0; i < sizeof commands / sizeof commands[0]; i++)
        fprintf(f, "  %-10s %s\n", commands[i].name, commands[i].summary);
    fprintf(f, "\n'likeness COMMAND --help' describes a command's options.\n"
               "'likeness --version' prints the version.\n");
}

int main(int argc, char **argv)
{
    if (argc < 2) {
        usage(stderr);
        return CLI_USAGE;
    }
    if (!strcmp(argv[1], "--help") || !strcmp(argv[1], "-h") || !strcmp(argv[1], "help")) {
        usage(stdout);
        return CLI_OK;
    }
    if (!strcmp(argv[1], "--version")) {
        printf("likeness %s\n", LIKENESS_VERSION);
        return CLI_OK;
    }
    for (size_t i = 0; i < sizeof commands / sizeof commands[0]; i++)
        if (!strcmp(argv[1], commands[i].name))
            return commands[i].run(argc - 1, argv + 1);
    cli_errorf("unknown command '%s'; 'likeness --help' lists the commands", argv[1]);
    return CLI_USAGE;
}
